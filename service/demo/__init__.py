"""The invented demo scenario (Fernhollow Community Health). Demo data only, never for tests
of the maths."""
