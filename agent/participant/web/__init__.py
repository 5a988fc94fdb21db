"""The participant's own page, served on the loopback interface (see docs/participant.md).

``PageServer`` serves it (from the agent or from ``lethe open``); ``login_url``
gives a URL with a fresh one-time token; ``build_app`` is the Starlette app.
"""

from .server import PageServer, login_url, open_browser, read_page_info

__all__ = ["PageServer", "login_url", "open_browser", "read_page_info"]
