"""The Flask web service: app factory, JSON API, pages, authentication, OpenAPI, uploads."""
