"""The packet-level discrete-event simulator: a shell around routerd's engine on virtual time.

Must not import zmq or prometheus (the closed-loop policy that talks to a live service
does so through ``routerd.client`` only).
"""
