"""Rendering reports to files people read (HTML pages); the data comes from service.policy."""
