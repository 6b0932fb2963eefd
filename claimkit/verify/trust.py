"""The user's pins applied: is the signer the key they expected, are the tokens from a TSA
they trust? Mechanics of the pins only; what is pinned comes from :class:`.policy.Policy`."""

from __future__ import annotations

from claimkit.verify.policy import Policy
from claimkit.verify.report import UNPINNED, VerifyReport

__all__ = ["check_signer", "check_tsa"]


def check_signer(fp: str, policy: Policy, rep: VerifyReport) -> None:
    """The bundle's key against the fingerprints the user pinned (``--expect-key``)."""
    if not policy.expect_keys:
        rep.add("signer key", True, f"the bundle is signed by the key with SHA-256 {fp}; "
                "no --expect-key pinned, so only the bundle vouches for it", status=UNPINNED)
        rep.out_of_band.append(f"the owner's key fingerprint SHA-256 {fp}: compare it with the "
                               "one the owner gives you through another channel (phone, "
                               "letter, their own web site), then pass it with --expect-key")
        return
    want = policy.pinned_keys
    rep.add("signer key", fp in want, f"SHA-256 {fp}, as pinned" if fp in want else
            f"the bundle is signed by the key with SHA-256 {fp}, not by the expected "
            f"{', '.join(sorted(want))}")


def check_tsa(tsa_names: set[str], policy: Policy, rep: VerifyReport) -> None:
    """Whether the tokens' authorities were pinned (each token is checked in :mod:`.checks`,
    against the pinned roots when there are some)."""
    if not tsa_names:
        if policy.tsa_roots is not None:
            rep.add("timestamp authority", False, "--tsa-roots was given, but no work in the "
                    "bundle carries a timestamp token to check against it")
        return
    names = ", ".join(sorted(tsa_names))
    if policy.tsa_roots is None:
        rep.add("timestamp authority", True, "the tokens verify against the TSA certificate "
                f"the bundle brings ({names}); no --tsa-roots pinned", status=UNPINNED)
        rep.out_of_band.append("the timestamp authority: obtain its root certificate from the "
                               "authority itself and give it with --tsa-roots FILE")
    else:
        rep.add("timestamp authority", True, f"every token chains to a pinned root ({names})")
