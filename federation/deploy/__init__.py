"""Running a study on Flower's deployment engine: TLS material, the SuperLink, the app bundle, online rounds.

See docs/deployment.md. ``commands`` wires these into the ``federation`` command line.
"""
