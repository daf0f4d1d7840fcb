"""Who may talk to the service, and what each reporter may speak for.

Owns: CURVE key pairs (``routerd keys``, ZeroMQ's certificate format through
``zmq.auth.create_certificates``), the allow file (reporter name → public key and the
nodes it may report for), the ZAP authenticator set-up (``zmq.auth.ThreadAuthenticator``
with a credentials callback over the allow file), the server- and client-side socket
options (:class:`ClientKeys`: a client's keys, loaded once), and the authorisation rules
applied to a decoded batch.

Must not import: the engine's state, the simulator, the service, prometheus.  Imports
zmq only inside the functions that need it (the rules themselves are pure).

Theory of operation
-------------------
With CURVE on, every ZeroMQ endpoint of the service is a CURVE server: a peer completes
the handshake only when the ZAP handler finds its public key in the allow file, and each
frame it sends then carries the ``User-Id`` property — the Z85 text of that key, which
:class:`Allow` maps back to one reporter name.  A batch is then held to that name:

* its ``reporter`` field must be the authenticated name (else the frame is refused,
  ``not_authorised``) — one key cannot write into another reporter's duplicate window;
* a hop row ``(from, via, dst, …)`` is taken only when ``from`` is one of the reporter's
  nodes (a node measures the hops that leave it), a link row ``(from, to, state)`` only
  when ``from`` is (a node watches the links that leave it; marking ``m → a`` down would
  move m's routes, so a key for ``a`` may not); other rows are rejected
  ``not_authorised`` one by one, the rest of the batch is kept;
* control operations that change state (:data:`STATE_OPS`) need an entry with
  ``control: true``; read-only ones (:data:`READ_OPS`) need any allowed key, or can be
  served without CURVE on a separate read-only endpoint.

The allow file (YAML, our own format)::

    # name: {public_key: Z85 text or a NAME.key file (relative to this file), nodes: [...]}
    agent-a:
      public_key: "rq:rM>}U?@Lns47E1%kR.o@n%FcmmsL/@{H8]yf7"
      nodes: [a]
    ops:
      public_key: keys/ops.key
      nodes: []
      control: true

A missing or empty allow file, an unreadable or secret-less server key, a node that is
not in the topology or a key given twice stop start-up with a message naming the file,
the line and the key: the authenticator alone would only log a bad key directory and
then let nobody (or, misconfigured, everybody) in.
"""
from __future__ import annotations

import argparse
import os
import stat
import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from routerd.core.errors import InputError, Problem
from routerd.core.topology import Topology
from routerd.io.files import parse_yaml

#: Control operations that change state: need a key with ``control: true``.
STATE_OPS: tuple[str, ...] = ("link", "snapshot", "reload")
#: Control operations that only read.
READ_OPS: tuple[str, ...] = ("tables", "estimates", "health", "nodes")
#: The rejection reason for rows and frames outside a reporter's rights.
NOT_AUTHORISED = "not_authorised"
_ENTRY_KEYS = frozenset({"public_key", "nodes", "control"})
_Z85_KEY_LEN = 40


# ---- key pairs ---------------------------------------------------------------------------
def configure(p: argparse.ArgumentParser) -> None:
    """``routerd keys``."""
    p.add_argument("name", metavar="NAME", help="key pair name: writes NAME.key (public) and "
                   "NAME.key_secret (secret, mode 0600)")
    p.add_argument("--out", metavar="DIR", required=True, help="directory to write into "
                   "(created if missing)")
    p.add_argument("--force", action="store_true", help="overwrite an existing pair of that name")


def run(args: argparse.Namespace) -> int:
    try:
        pub, sec = create_keys(args.out, args.name, force=args.force)
    except InputError as e:
        print(f"routerd keys: {e}", file=sys.stderr)
        return 2
    print(f"public key  {pub}   (goes into the service's allow file, or to the peers of a service)")
    print(f"secret key  {sec}   (keep it on this host only; mode 0600)")
    print(f"Z85 public  {read_public(pub).decode()}")
    return 0


def create_keys(out: str, name: str, *, force: bool = False) -> tuple[str, str]:
    """Write ``NAME.key`` and ``NAME.key_secret`` into ``out``; returns their paths."""
    import zmq.auth

    if not name or os.sep in name or name.startswith(".") or (os.altsep and os.altsep in name):
        raise InputError(f"key name {name!r}: use a plain file name (no path separators, not hidden)")
    from routerd.io.files import output_dir

    output_dir(out)          # a file in its place, or no write access: said as for every --out
    pub = os.path.join(out, f"{name}.key")
    sec = os.path.join(out, f"{name}.key_secret")
    for p in (pub, sec):
        if os.path.isdir(p):
            raise InputError(f"{p} is a directory; a key file cannot be written there")
        if os.path.exists(p) and not force:
            raise InputError(f"{p} exists; refusing to overwrite a key (use --force)")
    try:
        os.makedirs(out, exist_ok=True)
        old = os.umask(0o077)
        try:
            pub_p, sec_p = zmq.auth.create_certificates(out, name)
        finally:
            os.umask(old)
        os.chmod(sec_p, 0o600)
        os.chmod(pub_p, 0o644)
    except OSError as e:
        raise InputError(f"{e.filename or out}: cannot write keys: {e.strerror or e}") from None
    return str(pub_p), str(sec_p)


def _load_cert(path: str, *, want_secret: bool) -> tuple[bytes, bytes | None]:
    import zmq.auth

    if not os.path.exists(path):
        raise InputError(f"{path}: no such key file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a directory, expected a key file (NAME.key"
                         f"{'_secret' if want_secret else ''})")
    if os.path.getsize(path) == 0:
        raise InputError(f"{path}: the key file is empty")
    try:
        pub, sec = zmq.auth.load_certificate(path)
    except (OSError, ValueError, IndexError) as e:
        raise InputError(f"{path}: not a ZeroMQ certificate file ({e})") from None
    if not pub or len(pub) != _Z85_KEY_LEN:
        raise InputError(f"{path}: holds no public key")
    if want_secret and not sec:
        raise InputError(f"{path}: holds no secret key (give NAME.key_secret, not NAME.key)")
    return pub, sec


def load_server_key(path: str) -> tuple[bytes, bytes]:
    """The service's (public, secret) Z85 keys from a ``NAME.key_secret`` file."""
    pub, sec = _load_cert(path, want_secret=True)
    assert sec is not None
    return pub, sec


def read_public(path: str) -> bytes:
    """The Z85 public key of a ``NAME.key`` (or ``NAME.key_secret``) file."""
    return _load_cert(path, want_secret=False)[0]


def read_secret(path: str) -> tuple[bytes, bytes]:
    """(public, secret) of a ``NAME.key_secret`` file (client side)."""
    return load_server_key(path)


# ---- the allow file ----------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Reporter:
    """One allowed key: its name, Z85 public key, the nodes it speaks for (names and a
    boolean mask over node indices) and whether it may change state over control."""

    name: str
    public_key: bytes
    nodes: tuple[str, ...]
    mask: np.ndarray
    control: bool = False
    line: int = 0


class Allow:
    """The allow file, checked against a topology."""

    def __init__(self, source: str, reporters: Sequence[Reporter]):
        self.source = source
        self.reporters = tuple(reporters)
        self.by_key: dict[bytes, Reporter] = {r.public_key: r for r in reporters}
        self.by_name: dict[str, Reporter] = {r.name: r for r in reporters}

    def __len__(self) -> int:
        return len(self.reporters)

    def for_user_id(self, user_id: str | bytes | None) -> Reporter | None:
        """The reporter behind a frame's ``User-Id`` (the Z85 text of its key)."""
        if user_id is None:
            return None
        k = user_id.encode() if isinstance(user_id, str) else bytes(user_id)
        return self.by_key.get(k)

    # ZAP credentials provider (zmq.auth's callback protocol)
    def callback(self, domain: str, key: bytes) -> bool:
        """``key`` is the peer's Z85 public key (zmq.auth encodes it before calling)."""
        return bytes(key) in self.by_key


def _lines(path: str, text: str) -> dict[tuple[str, ...], int]:
    """Line (1-based) of every mapping key, by key path — so errors can name the line."""
    import yaml

    out: dict[tuple[str, ...], int] = {}
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError:
        return out

    def walk(node: Any, at: tuple[str, ...]) -> None:
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                key = (*at, str(k.value))
                if key in out:
                    out[("__dup__",) + key] = k.start_mark.line + 1
                else:
                    out[key] = k.start_mark.line + 1
                walk(v, key)

    walk(root, ())
    return out


def load_allow(path: str, topo: Topology) -> Allow:
    """Read and check an allow file.  Raises :class:`InputError` listing every problem
    (``FILE:LINE: NAME.key: value rule``)."""
    import yaml

    if not os.path.exists(path):
        raise InputError(f"{path}: no such allow file")
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"{path}: cannot read the allow file: {e}") from None
    try:
        # the one YAML loader (routerd.io.files); repeated names are listed below, every one
        doc = parse_yaml(text, unique_keys=False)
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        at = f":{mark.line + 1}" if mark is not None else ""
        raise InputError(f"{path}{at}: not YAML: {getattr(e, 'problem', None) or e}") from None
    if doc is None or doc == {}:
        raise InputError(f"{path}: the allow file lists no reporters; with CURVE on no peer "
                         "could connect")
    if not isinstance(doc, dict):
        raise InputError(f"{path}:1: the allow file must map reporter names to entries, "
                         f"got a {type(doc).__name__}")
    lines = _lines(path, text)
    problems: list[Problem] = []
    for k, ln in lines.items():
        if k[0] == "__dup__" and len(k) == 2:
            problems.append(Problem(f"{path}:{ln}: {k[1]}", k[1], "is listed twice"))
    base = os.path.dirname(os.path.abspath(path))
    out: list[Reporter] = []
    seen_keys: dict[bytes, str] = {}
    for name, entry in doc.items():
        ln = lines.get((str(name),), 0)

        def where(key: str | None = None, _n: Any = name, _ln: int = ln) -> str:
            kl = lines.get((str(_n), key), _ln) if key else _ln
            return f"{path}:{kl}: {_n}" + (f".{key}" if key else "")

        if not isinstance(name, str) or not name:
            problems.append(Problem(where(), name, "is not a reporter name (a non-empty string)"))
            continue
        if not isinstance(entry, dict):
            problems.append(Problem(where(), entry, "must be a map with public_key and nodes"))
            continue
        for k in entry:
            if k not in _ENTRY_KEYS:
                problems.append(Problem(where(str(k)), entry[k], "is not a key of an allow entry "
                                        f"(keys: {', '.join(sorted(_ENTRY_KEYS))})"))
        pk = entry.get("public_key")
        key: bytes | None = None
        if pk is None:
            problems.append(Problem(where(), name, "has no public_key"))
        elif not isinstance(pk, str):
            problems.append(Problem(where("public_key"), pk, "must be Z85 text or a key file path"))
        elif len(pk) == _Z85_KEY_LEN and _is_z85_key(pk):
            key = pk.encode()
        else:
            kp = pk if os.path.isabs(pk) else os.path.join(base, pk)
            if os.path.exists(kp):
                try:
                    key = read_public(kp)
                except InputError as e:
                    problems.append(Problem(where("public_key"), pk, f"cannot be read: {e}"))
            else:
                problems.append(Problem(where("public_key"), pk, "is neither a Z85 key (40 "
                                        "characters) nor an existing key file"))
        nodes = entry.get("nodes")
        names: list[str] = []
        if not isinstance(nodes, list):
            problems.append(Problem(where("nodes"), nodes, "must be a list of node names"))
        else:
            for x in nodes:
                if not isinstance(x, str) or x not in topo.index:
                    problems.append(Problem(where("nodes"), x, f"is not a node of topology "
                                            f"{topo.name!r}"))
                else:
                    names.append(x)
        ctl = entry.get("control", False)
        if not isinstance(ctl, bool):
            problems.append(Problem(where("control"), ctl, "must be true or false"))
            ctl = False
        if key is not None:
            if key in seen_keys:
                problems.append(Problem(where("public_key"), pk, f"is also the key of "
                                        f"{seen_keys[key]!r}: one key, one reporter"))
                continue
            seen_keys[key] = name
            mask = np.zeros(topo.n, dtype=bool)
            mask[[topo.index[x] for x in names]] = True
            out.append(Reporter(name, key, tuple(names), mask, bool(ctl), ln))
    if problems:
        raise InputError(problems)
    return Allow(path, out)


def is_key_text(s: str) -> bool:
    """True when ``s`` is a Z85 CURVE key itself (40 characters decoding to 32 bytes),
    not the path of a key file."""
    return len(s) == _Z85_KEY_LEN and _is_z85_key(s)


def _is_z85_key(s: str) -> bool:
    from zmq.utils import z85

    try:
        return len(z85.decode(s.encode())) == 32
    except (ValueError, KeyError, TypeError):
        return False


# ---- sockets -------------------------------------------------------------------------------
def start_authenticator(ctx: Any, allow: Allow) -> Any:
    """A started ``zmq.auth.ThreadAuthenticator`` on ``ctx`` that lets in exactly the keys
    of ``allow`` (every domain).  Stop it with ``.stop()`` before ``ctx.term()``."""
    from zmq.auth.thread import ThreadAuthenticator

    auth = ThreadAuthenticator(ctx)
    auth.start()
    auth.configure_curve_callback(domain="*", credentials_provider=allow)
    return auth


def make_server(sock: Any, public: bytes, secret: bytes) -> None:
    """CURVE server options on ``sock`` — call before ``bind``."""
    import zmq

    sock.setsockopt(zmq.CURVE_SECRETKEY, secret)
    sock.setsockopt(zmq.CURVE_PUBLICKEY, public)
    sock.setsockopt(zmq.CURVE_SERVER, 1)


@dataclass(frozen=True, slots=True)
class ClientKeys:
    """Client side of CURVE, loaded once: our Z85 key pair and the service's Z85 public
    key.  :meth:`apply` sets them on a socket before ``connect``; ``source`` names the
    files for messages.  Build with :meth:`load` (or :func:`client_keys` from config)."""

    public: bytes
    secret: bytes
    server_public: bytes
    source: str = ""

    @classmethod
    def load(cls, secret_file: str, server_key: str | bytes) -> ClientKeys:
        """From our ``NAME.key_secret`` file and the service's public key: its ``NAME.key``
        file or the Z85 text itself.  Raises :class:`InputError` naming the file."""
        pub, sec = read_secret(secret_file)
        if isinstance(server_key, bytes):
            server_key = server_key.decode("ascii", "replace")
        if is_key_text(server_key):
            spub, where = server_key.encode(), "Z85 text"
        else:
            spub, where = read_public(server_key), server_key
        return cls(pub, sec, spub, f"{secret_file} -> service key {where}")

    def apply(self, sock: Any) -> None:
        """CURVE client options on ``sock`` — call before ``connect``."""
        import zmq

        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.server_public)


def client_keys(client_key: str | None, server_key: str | None, where: str) -> ClientKeys | None:
    """Client CURVE from a pair of config values (``where``: their common key prefix, e.g.
    ``agent``): both set → :class:`ClientKeys`, neither → None, one → InputError."""
    if not client_key and not server_key:
        return None
    if not client_key or not server_key:
        have, need = ("client_key", "server_key") if client_key else ("server_key", "client_key")
        raise InputError(f"{where}.{have} is set without {where}.{need}: client CURVE needs "
                         f"both (our NAME.key_secret and the service's NAME.key or Z85 key)")
    return ClientKeys.load(client_key, server_key)


def make_client(sock: Any, secret_file: str, server_public: bytes) -> None:
    """CURVE client options on ``sock`` from a ``NAME.key_secret`` file and the service's
    Z85 public key — call before ``connect``."""
    ClientKeys.load(secret_file, server_public).apply(sock)


def user_id(frame: Any) -> str | None:
    """The authenticated ``User-Id`` of a received ``zmq.Frame`` (None without CURVE)."""
    try:
        v = frame.get("User-Id")
    except Exception:  # noqa: BLE001 - no such property on an unauthenticated frame
        return None
    return v or None


# ---- authorisation -------------------------------------------------------------------------
def hop_rights(rep: Reporter, src: np.ndarray) -> np.ndarray:
    """Mask of the hop rows (by ``from`` index) this reporter may report."""
    s = np.asarray(src, dtype=np.int64)
    ok = (s >= 0) & (s < rep.mask.shape[0])
    out = np.zeros(s.shape[0], dtype=bool)
    out[ok] = rep.mask[s[ok]]
    return out


def link_rights(rep: Reporter, links: Iterable[Sequence[Any]]) -> list[bool]:
    """For each ``(src, dst, up)`` link row: does the link leave one of the reporter's
    nodes?  Only ``src`` counts: a link's state changes the routes of its source alone."""
    m = rep.mask
    n = m.shape[0]
    return [0 <= int(a) < n and bool(m[int(a)]) for a, *_ in links]


def may_control(rep: Reporter | None, op: str) -> bool:
    """May this peer run control ``op``?  Read-only ops: any allowed key."""
    if op in READ_OPS:
        return rep is not None
    return rep is not None and rep.control


def recv_with_peer(sock: Any, flags: int, allow: Allow | None) -> tuple[list[bytes], Reporter | None]:
    """One message from ``sock`` (``recv_multipart(flags)``: zmq.Again when none waits)
    and, with CURVE on (``allow`` set), the allowed reporter its last frame's ``User-Id``
    belongs to (None for a key not in the allow file, and without CURVE)."""
    if allow is None:
        return sock.recv_multipart(flags), None
    frames = sock.recv_multipart(flags, copy=False)
    return [f.bytes for f in frames], allow.for_user_id(user_id(frames[-1]))


def control_refusal(op: str, peer: Reporter | None, *, curve: bool, readonly: bool) -> str | None:
    """Why control ``op`` from ``peer`` is refused (the error text), or None when it may
    run: on the read-only endpoint only :data:`READ_OPS`; under CURVE a state-changing op
    needs a key with the control right."""
    if readonly and op not in READ_OPS:
        return (f"not_authorised: op {op!r} changes state; the read-only control endpoint "
                f"serves {', '.join(READ_OPS)}")
    if curve and not may_control(peer, op):
        who = "no allowed key" if peer is None else f"the key of {peer.name!r}"
        return (f"not_authorised: op {op!r} changes state and came with {who}, which has no "
                "control right (control: true in the allow file)")
    return None


def exposed(endpoint: str | None) -> bool:
    """True when a ZeroMQ endpoint or a HOST:PORT address can be reached from other hosts
    (TCP on anything but a loopback address; ipc:// and inproc:// never)."""
    import ipaddress

    if not endpoint:
        return False
    ep = endpoint
    if "://" in ep:
        scheme, ep = ep.split("://", 1)
        if scheme not in ("tcp", "ws", "wss", "udp", "pgm", "epgm"):
            return False
    host = ep.rsplit(":", 1)[0] if ":" in ep else ep
    host = host.strip("[]").split(";")[-1]
    if host in ("localhost", "localhost.localdomain"):
        return False
    try:
        return not ipaddress.ip_address(host).is_loopback
    except ValueError:
        return True   # an interface name, "*" or a host name: assume reachable


def describe(allow: Allow) -> list[str]:
    """One line per allowed key, for the start-up banner."""
    return [f"{r.name}: nodes {', '.join(r.nodes) or '-'}" + ("; control" if r.control else "")
            for r in allow.reporters]


def key_file_exposure(path: str) -> str | None:
    """Why the secret key file ``path`` is open to more than its owner (group or other
    permission bits set), with the fix; None when it is owner-only (or unreadable: loading
    it says so).  Whoever can read it can act as the service."""
    try:
        mode = stat.S_IMODE(os.stat(path).st_mode)
    except OSError:
        return None
    bits = mode & 0o077
    if not bits:
        return None
    who = " and ".join(w for w, m in (("its group", 0o070), ("other users", 0o007)) if bits & m)
    return (f"secret key file {path} has mode {mode:04o}: {who} can read or change it, and "
            f"whoever reads it can act as this service; fix: chmod 600 {path}")


def load_configured(cfg: Any, topo: Topology) -> tuple[tuple[bytes, bytes], Allow, str | None] | None:
    """A config's CURVE setting loaded and checked: (server keys, allowed reporters, why the
    secret key file is open to others or None), or None when CURVE is off.  Raises
    :class:`InputError` (one key without the other, a bad key or allow file).  The service
    and the shard front both start from this."""
    sk, al = check_pair(cfg)
    if sk is None or al is None:
        return None
    keys = load_server_key(sk)
    return keys, load_allow(al, topo), key_file_exposure(sk)


def check_pair(cfg: Any) -> tuple[str | None, str | None]:
    """(server_key, allow) from a config, both or neither (else InputError)."""
    sk, al = cfg["security.server_key"], cfg["security.allow"]
    if bool(sk) != bool(al):
        # named as a config file spells them too: it may have come from one, not a flag
        have, need = (("security.server_key (--server-key)", "security.allow (--allow)") if sk
                      else ("security.allow (--allow)", "security.server_key (--server-key)"))
        src = getattr(cfg, "source", None)
        where = f"{src}: " if isinstance(src, str) and src and not src.startswith("<") else ""
        raise InputError(f"{where}CURVE needs both --server-key and --allow: {have} was given "
                         f"without {need}")
    return sk, al
