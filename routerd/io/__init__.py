"""Inputs and durable formats: config and its schema, the one rule for config-relative
paths, topology and scenario files, the wire protocol, the journal and snapshots, the state
directory, CURVE key and allow files, clocks.

Must not import: ``prometheus_client``, ``routerd.service``, ``routerd.agent``,
``routerd.sim``, ``routerd.tools``.
"""

MUST_NOT_IMPORT: tuple[str, ...] = ('prometheus_client', 'routerd.service', 'routerd.agent', 'routerd.sim', 'routerd.tools')
