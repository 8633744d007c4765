"""The integration engine: step-control constants, the compiled per-member kernel and its dispatch.

The numpy ensemble stepper in :mod:`impact.engine.integrate` is the reference; :mod:`impact.engine.kernel`
is the compiled per-member kernel for the food web, checked against it. This package's
``__init__`` imports nothing so that :mod:`impact.engine.integrate` can use :mod:`impact.engine.control`
without a cycle.
"""
