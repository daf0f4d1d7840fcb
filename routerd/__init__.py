"""routerd: adaptive next-hop tables for test-lab overlay networks.

Public surface: :mod:`routerd.core.topology` (the network model), :mod:`routerd.io.config`
(settings), :mod:`routerd.core.engine` (the pure learning core), :mod:`routerd.core.loops`.
The shells — the service, the simulator (``routerd.sim``, sources in ``sim/``) and replay — drive the engine.
"""
__version__ = "0.1.0"
