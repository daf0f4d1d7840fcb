"""routerd: adaptive next-hop tables for test-lab overlay networks.

Public surface: :mod:`routerd.topology` (the network model), :mod:`routerd.config`
(settings), :mod:`routerd.engine` (the pure learning core), :mod:`routerd.loops`.
The shells — the service, the simulator (package ``sim``) and replay — drive the engine.
"""
__version__ = "0.1.0"
