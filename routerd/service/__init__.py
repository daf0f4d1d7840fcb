"""The daemon shell (``routerd serve``): the zmq loop, the ingest pipeline, duplicate
windows, metrics, and the sharded front and workers.

Must not import: ``routerd.sim``, ``routerd.tools``, ``routerd.agent.forwarder`` (the
client library, ``routerd.agent.client``, is allowed: shard workers report through it).
"""

MUST_NOT_IMPORT: tuple[str, ...] = ('routerd.sim', 'routerd.tools', 'routerd.agent.forwarder')
