"""The overlay side: the forwarding agent (``routerd agent``), its packet header, and the
client library (reporter, table subscriber, control) that agents, the closed-loop
simulator and tests use.

Must not import: ``routerd.service``, ``routerd.sim``, ``routerd.tools``,
``routerd.core.engine``, ``routerd.core.guards``, ``routerd.io.journal`` (an agent
forwards and measures; it does not learn or store).
"""

MUST_NOT_IMPORT: tuple[str, ...] = ('routerd.service', 'routerd.sim', 'routerd.tools', 'routerd.core.engine', 'routerd.core.guards', 'routerd.io.journal')
