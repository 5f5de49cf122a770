"""The web page and HTTP API (FastAPI, Jinja2 templates, Plotly served from static/)."""
