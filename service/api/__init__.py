"""Layer 3: the HTTP service (FastAPI). Build it with ``service.api.app.create_app(settings)``."""
