"""Campaigns: recipe → plan → driver and workers → store → merge, status, audit.

Modules, in the order data flows through them:

``recipe``    TOML schema, complete validation, points, canonical form and hash
``plan``      frozen settings, seeds, replica specs, round decisions, cost model, plan
``progress``  per-point rounds replayed from stored rows; the preview of a run
``store``     directory layout, pinned Arrow schema, the one replica-row reader, lock
``worker``    one replica on a Dask worker, with checkpoints
``connect``   the Dask connection (embedded, existing scheduler, batch cluster)
``driver``    the run: replay, submit, result, error, flush
``summary``   ``merge`` (per-point table) and ``status``
``audit``     integrity, seed trace, recomputation
"""
