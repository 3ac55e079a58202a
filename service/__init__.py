"""Everything in stagewatch that touches the outside world.

The command line now; later the REST service, persistence, the historian bridge
and replay. Arrows point one way: service imports estimator, never the reverse.
"""
