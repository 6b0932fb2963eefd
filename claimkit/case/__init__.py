"""Casework: exhibits taken in, examinations kept, alignment, the bundle.

- :mod:`.store` -- the case folder and intake of disputed copies;
- :mod:`.examine` -- examination of every exhibit, with the decoy-key control;
- :mod:`.align` -- alignment of a copy to the registered picture (SSIM, difference map);
- :mod:`.layout` -- where every file of a case and its bundle lives;
- :mod:`.bundle` -- the hand-over zip (verification is :mod:`claimkit.verify`).
"""
