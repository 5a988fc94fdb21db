"""The study server: receives enrolments, bundles and withdrawal certificates over HTTPS.

``store``      the database (SQLAlchemy Core; SQLite WAL by default, PostgreSQL by URL)
``tls``        the server certificate: ``--self-signed`` generation and the pin agents check
``intake``     the verification every upload goes through (the same checks as ``lethe study open``)
``app``        the Starlette application: the API (``/v1/...``) and the researcher's dashboard
``run``        serving it with uvicorn

The API is a contract: ``docs/server.md``.
"""
