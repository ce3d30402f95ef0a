"""HTTP API: one router per resource, thin; the logic lives in ``service.store``."""
