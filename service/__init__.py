"""flipfix service: the gRPC layer over the repair core.

Thin by design: :mod:`service.convert` turns protos into domain objects and back,
:mod:`service.server` calls :func:`repair.repair` in a process pool,
:mod:`service.store` keeps problems and candidate libraries in SQLite.
"""
