"""The dossier: data gathered from stored findings, figures, PDF (signed) and HTML.

- :mod:`.data` -- every number and fact the report shows, read from the bundle's files;
- :mod:`.figures` -- the figures, drawn with NumPy and Pillow;
- :mod:`.render` -- jinja2 templates to PDF (reportlab) and HTML;
- :mod:`.pdfsign` -- the PAdES signature and its check;
- :mod:`.build` -- the order in which a report is built, and the signed manifest.
"""
