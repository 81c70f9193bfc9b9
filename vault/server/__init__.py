"""The vault as an HTTP/JSON service (`mindward serve`): FastAPI on uvicorn.

Like the command line, the service calls the public Vault API only: each endpoint authenticates
the caller's token through `Vault.authenticate` and makes one library call, and the library
decides. Importing this package loads no web framework; `run.serve` and `app.build_app` import
it when called (`import vault` and `mindward --help` stay light).
"""
