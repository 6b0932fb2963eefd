"""claimkit: keyed invisible watermarks and the evidence that goes with them."""

__version__ = "0.3.0.dev0"
