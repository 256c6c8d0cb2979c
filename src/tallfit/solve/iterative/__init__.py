"""Iterative least-squares solvers that stream the data once per iteration or epoch.

One module per solver (``gd``, ``cg``, ``lbfgs``, ``sgd``), each with ``NAME``, ``DEFAULTS`` and
``run(problem, blocks, history, **options)``; ``problem`` holds the design's change of variable
and one streamed pass, ``stopping`` the shared record, stop and divergence rules, and ``driver``
turns a run into a :class:`~tallfit.results.FitResult`. The passes themselves are scheduled by
the engine (``engine.cache.DesignPasses``), which hands blocks to the solvers.
"""
