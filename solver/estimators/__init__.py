"""Estimators of means and error bars over correlated samples (plain functions on arrays):
initial-transient removal, blocking, pooled estimates. Used by the run hooks, the readers and
the report alike; imports nothing else of eddybox."""
