"""The library's verbs: one module per command that does more than print a plan.

Every workflow that runs a study starts with :func:`pipeline.workflows.prepare.prepare` (the
study loaded and compiled, the extract located, the engine constructed with the study's and the
command line's settings); what it writes goes through :mod:`pipeline.outputs`. Modules:
``build``, ``verify``, ``explain``, ``validate`` (with ``_reference``, the reference file),
``codes`` (with ``_codes_files``), ``check`` (``check --extract``), ``profile`` (with
``_profile_queries``, its DuckDB half), ``diff`` and ``init``. Nothing is imported here, so
a command loads only what it uses (scipy, for one, only for validation).
"""
