"""html: the report dict -> one self-contained HTML page (inline CSS and SVG, no script, no network).

page.py lays out the sections, charts.py draws the SVG charts, figures.py finds and tags each figure
by its JSON path, style.py holds the CSS.
"""
from qfit.report.html.figures import FORMATS, display, format_for_path, lookup, path_join, path_split  # noqa: F401
from qfit.report.html.page import render_html  # noqa: F401
