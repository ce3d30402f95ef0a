"""Operations: Prometheus metrics (``metrics``, ``db_metrics``), JSON logs with a request id
(``json_logs``) and the ASGI middleware that times each request and carries its id
(``middleware``)."""
