"""The decision log's seals and verification, audit runs and report rendering."""
