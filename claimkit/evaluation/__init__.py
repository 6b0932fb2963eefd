"""Evaluative reporting: likelihood ratios per line of evidence, the verbal scale, the timeline.

``lr`` holds the arithmetic (pure functions on numbers), ``opinion`` puts the
lines together for one exhibit, ``timeline`` orders every date with its source.
"""
