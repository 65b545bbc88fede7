"""The one HTTP application of the service: the ward board, /health, /metrics and the
acknowledgement links of paged alarms (Starlette on uvicorn, in a thread of its own).

`site.Site` is what the application needs from the service; `app.build_app` makes the
application; `server.WebServer` serves it on one or more addresses.
"""
