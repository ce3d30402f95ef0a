"""The tamper-evident log: Merkle tree hashing (RFC 9162), signed tree heads and proofs.

``merkle`` and ``heads`` use only the standard library and ``cryptography``, so the standalone
verifier of month bundles can use them without the service's dependencies.
"""
