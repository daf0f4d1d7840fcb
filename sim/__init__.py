"""The packet-level discrete-event simulator (installed as ``routerd.sim``; its sources stay
in the repository's top-level ``sim/`` folder): a shell around routerd's engine on virtual
time.

Must not import: ``zmq``, ``prometheus_client``, ``routerd.service``, ``routerd.tools``
(the closed-loop policy that talks to a live service does so through
``routerd.agent.client`` only).
"""

MUST_NOT_IMPORT: tuple[str, ...] = ("zmq", "prometheus_client", "routerd.service", "routerd.tools")
