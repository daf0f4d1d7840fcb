"""The pure learning core: the topology value and its paths, the engine (Q-values, batched
exact updates, decisions, link state), its variants, loop finding and the plausibility
guards.  No files, sockets or clocks: numpy only.

Must not import: ``zmq``, ``prometheus_client``, ``yaml``, ``msgpack``, ``routerd.io``,
``routerd.service``, ``routerd.agent``, ``routerd.sim``, ``routerd.tools``.
"""

MUST_NOT_IMPORT: tuple[str, ...] = ('zmq', 'prometheus_client', 'yaml', 'msgpack', 'routerd.io', 'routerd.service', 'routerd.agent', 'routerd.sim', 'routerd.tools')
