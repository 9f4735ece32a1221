"""Thin routers: parse, call the store/engine, shape the answer. Errors become problem+json in service.api.exception_handlers."""
