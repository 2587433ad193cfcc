"""The HTTP surface: dependencies (``deps``), OpenAPI documentation (``docs``) and the routes."""
