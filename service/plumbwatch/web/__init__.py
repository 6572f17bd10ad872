"""Status pages: Jinja2 templates, server-side SVG charts, view models from plain data.

This package never queries: ``plumbwatch.api`` gathers records, sketches and
alerts and hands them over as plain dicts and numbers.
"""
