"""The lab server's protections around Panel's and Bokeh's own server (used by ``serve.py``).

- :mod:`labserver.routes`: only the routes the page needs are reachable; every other path is
  answered 404 without running any handler.
- :mod:`labserver.websocket`: bounds on one websocket message (bytes, buffers, time to complete)
  and on a connection's message rate; a connection joins only a live page of its own login.
- :mod:`labserver.sessions`: limits on open pages per client address and in total, a page-open
  rate per address, and pages whose websocket never connects are freed within seconds.
- :mod:`labserver.login`: the login form, per-address rate limit, exact password comparison,
  revocable logins and cookie flags.

Nothing here imports the page; ``serve.py`` puts the pieces together.
"""

from __future__ import annotations
