"""flipfix service: the gRPC layer over the repair core.

Thin by design: :mod:`flipfix.service.convert` turns protos into domain objects and back,
:mod:`flipfix.service.server` calls :func:`flipfix.repair.repair` in a process pool,
:mod:`flipfix.service.store` keeps problems and candidate libraries in SQLite.
"""
