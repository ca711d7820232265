"""The study report (``ascertain report``): report.html and the suppressed ``summary/*.csv``.

One package because the report is one system: its tables (``_tables``, ``_table_one``,
``_at_risk``, ``_rates``) describe their counts as blocks, ``_cells`` and ``_suppression``
protect all of them at once, ``_curves`` coarsens the curves, and the ``_html*`` and ``_svg``
modules draw what was released. ``_write`` reads a build's folder and writes the files.
Importing it loads scipy (through the statistics), which a build never needs, so nothing
outside the report command imports it.
"""

from pipeline.outputs.report._write import DEFAULT_THRESHOLD, write_report

__all__ = ["DEFAULT_THRESHOLD", "write_report"]
