"""The review pages' rendering: Jinja2 templates with autoescaping (templates/), the data they show
(pages, report_view), inline SVG charts as markupsafe.Markup (charts), and the self-hosted
stylesheet and script in static/. No web framework imports: the routes in apportion/api/routes/ui.py
serve these templates through Starlette's Jinja2 integration."""
