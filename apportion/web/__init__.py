"""The review pages' rendering: server-drawn HTML and inline SVG (pages, charts, report_view) and
the self-hosted stylesheet and script in static/. No web framework imports; the routes live in
apportion/api/routes/ui.py."""
