"""Thin routers: parse, call the store/engine, shape the answer. Errors go through service.api.problems."""
