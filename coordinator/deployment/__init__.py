"""Real deployment: a hub (Flower SuperLink with TLS and site authentication) and studies on it.

Modules: :mod:`.certificates` (a throwaway consortium CA and server certificate),
:mod:`.hub` (start the hub, admit, list and remove sites), :mod:`.study` (run a study
against the connected sites, resumable), :mod:`.cli` (the ``sitepool coordinator`` group).
"""
