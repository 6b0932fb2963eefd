"""The evidence layer: keys and profile, signed work records, timestamps, custody log.

Modules read like the workflow:

- :mod:`.profile` -- the owner's profile (keys, registry, custody log) and its API;
- :mod:`.canonical` -- the byte encoding of anything that is signed;
- :mod:`.storage` -- streaming SHA-256 and crash-safe file writes;
- :mod:`.signing` -- Ed25519 behind a narrow API;
- :mod:`.keystore` -- keys sealed at rest under the passphrase;
- :mod:`.custodylog` -- the append-only, hash-chained, signed custody log;
- :mod:`.merkle` -- RFC 6962 Merkle trees and inclusion proofs;
- :mod:`.timestamp` -- RFC 3161 requests and the checks on responses;
- :mod:`.stamping` -- one token for many works (Merkle root), pending requests, proofs;
- :mod:`.checks` -- re-checking a work, or the whole profile against its custody log;
- :mod:`.disclose` -- what an independent expert receives, and its check.
"""
