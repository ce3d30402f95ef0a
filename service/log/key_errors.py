"""The error of an unusable signing or public key, in a module of its own (standard library
only): the settings and the CLI's error mapping name it without loading ``cryptography``."""

from __future__ import annotations


class SigningKeyError(ValueError):
    """A signing or public key that cannot be used (missing, malformed or weak)."""
