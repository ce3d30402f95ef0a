"""Pure policy mathematics: documents, rule evaluation, rates and derivation.

Nothing in this package touches a database, the network or the file system.
"""
