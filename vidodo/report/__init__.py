"""Reporting: what a grade folder holds besides the analysis itself.

``grade_files`` writes drift.csv, events.csv, summary.json and track.csv; ``build``
reads them back and makes the pictures (``plots``), the self-contained HTML page
(``page``) and the annotated replay video (``replay``).
"""
