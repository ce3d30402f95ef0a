"""Scheduled work: the audits of matured months (``due_audits``) and the loop the compose job
runner runs (``runner``)."""
