"""The rig model and its checking: rig files, parts, overrides, typed settings of
controller, link and chains, campaign files, rigs built from Python.

Public names are read from plantrig.sim."""
