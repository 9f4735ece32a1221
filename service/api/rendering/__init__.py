"""What the HTTP layer draws and writes for people: figures (matplotlib) and their JSON twins, the HTML
pages (Jinja2 templates, autoescaped) and the pages' static CSS and JavaScript. Nothing here handles a
request; the routes in ``service.api.routes`` call these functions."""
