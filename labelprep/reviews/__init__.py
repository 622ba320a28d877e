"""``labelprep review DIR``: a local page over a ``prepare`` folder that records decisions.

:mod:`.queue` holds what needs a human (clusters, conflicts, flagged files) in review order and
pages through it; :mod:`.server` serves the page and its API on 127.0.0.1 with a token and writes
each decision to the decisions file (:mod:`labelprep.decisions`) at once. The page itself is in
``assets/`` (HTML, script and styles, no third-party code).
"""

from __future__ import annotations

from .server import make_server

__all__ = ["make_server"]
