"""What operators look at, read from snapshots, metric logs, event files and saved models.

============  ============================================================================
rule_sources  rules from a model, a snapshot file or a snapshot directory; diff sides
explain       which rule fired for a record, and the path that led there
live_view     the live terminal view (state kept apart from a pure render)
report        one self-contained HTML page with inline SVG plots (``svg_plot``)
run_logs      reading JSON-lines logs, also while a run writes them
progress      progress of a long run on stderr
============  ============================================================================
"""
