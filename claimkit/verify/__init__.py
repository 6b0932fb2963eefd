"""Verification of a hand-over bundle: the layer above the case and the dossier.

- :mod:`.policy` -- what the person verifying asks for and pins (:class:`Policy`);
- :mod:`.trust` -- the pins applied: expected owner key, trusted timestamp authorities;
- :mod:`.run` -- :func:`verify_bundle`, the order of the checks;
- :mod:`.unpack` -- reading a zip or folder without escaping it;
- :mod:`.checks` -- manifest, key disclosures, custody log, exhibits, paths;
- :mod:`.rerun` -- each examination and robustness row re-run from the disclosed key;
- :mod:`.dossier` -- the dossier rebuilt and compared;
- :mod:`.compare` -- stored numbers against re-derived ones;
- :mod:`.report` -- :class:`VerifyReport`, every check and its outcome.
"""

from claimkit.verify.policy import Policy
from claimkit.verify.report import VerifyReport
from claimkit.verify.run import verify_bundle
from claimkit.verify.unpack import MAX_BUNDLE_BYTES, safe_extract

__all__ = ["MAX_BUNDLE_BYTES", "Policy", "VerifyReport", "safe_extract", "verify_bundle"]
