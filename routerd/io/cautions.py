"""The operating cautions, printed at start-up by every command that can change routes.

One text, so the README, the service and the demo say the same thing.
"""

CAUTIONS = """\
CAUTION: adaptive routing can create forwarding loops or black holes in real traffic.
  * Use it in a lab first; validate settings offline with `routerd simulate` and replay.
  * Put route-policy changes under your change control, like any routing change.
  * Keep a static fallback: forwarding agents must be able to revert to static routes.
  * Local operating rules and the network owner's instructions take precedence over routerd."""
