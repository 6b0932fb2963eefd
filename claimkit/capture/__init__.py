"""Where a copy was found, kept as the server sent it: web capture and WARC files.

- :mod:`.fetch`: one HTTP(S) exchange on a socket of our own (address, TLS
  facts, certificate chain, bytes as sent and received);
- :mod:`.pagescan`: the image URLs an HTML page references;
- :mod:`.warc`: writing WARC/1.1 with warcio, and reading any crawler's WARC;
- :mod:`.snapshot`: a full-page picture by headless Chromium;
- :mod:`.collect`: ``claimkit case capture``, which puts all of it in a case.

This package sits beside ``claimkit.case``: it may use the case store and the
evidence layer; the command line, ``scan``, the dossier and ``verify`` use it.
"""
