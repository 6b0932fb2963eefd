"""Casework: exhibits taken in, examinations kept, alignment, bundles and their verification.

- :mod:`.store` -- the case folder and intake of disputed copies;
- :mod:`.examine` -- examination of every exhibit, with the decoy-key control;
- :mod:`.align` -- alignment of a copy to the registered picture (SSIM, difference map);
- :mod:`.bundle` -- the hand-over zip;
- :mod:`.verify` -- what the other side runs on it.
"""
