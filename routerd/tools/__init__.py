"""Commands that combine the shells: the ``routerd`` entry point, ``validate``, ``replay``,
``demo`` and ``lab``.  May import any subpackage; nothing imports it but
``routerd.__main__``.

Must not import: (no rule).
"""

MUST_NOT_IMPORT: tuple[str, ...] = ()
