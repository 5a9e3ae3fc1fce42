"""HTTP route handlers, a module per resource; each handler is a few lines."""
