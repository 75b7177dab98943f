"""The listening page: hear rendered sounds side by side, keep or reject them.

``shotsmith listen`` runs :func:`pipeline.listen.server.serve`: a small HTTP server
on 127.0.0.1 with a per-session token, serving a static page shipped in this package
(``static/``) and only the files the folders' manifests list. Marks are saved to
``picks.json`` beside each manifest (:mod:`pipeline.listen.picks`); nothing here
imports torch.
"""

from pipeline.listen.picks import load_picks, set_pick

__all__ = ["load_picks", "set_pick"]
