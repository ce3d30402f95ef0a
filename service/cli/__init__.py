"""The ``evenhand`` command line: thin wrappers over the same functions the API calls."""
