"""routerd.sim.linktrace: link delays over time from a CSV, applied by the simulator.

The worked example is store-and-forward arithmetic (common practice; e.g. Kurose & Ross,
Computer Networking, §1.4 "nodal delay", from memory): a lone packet of L bits crossing
links k takes sum_k (L / C_k + d_k); a delay change on one link from time t on moves the
delivery time of every packet sent over it after t by exactly the change.
"""
from __future__ import annotations

from typing import Any

import pytest

from routerd.core.errors import InputError
from routerd.io import config
from routerd.io.inputs import load_topology
from routerd.sim import linktrace as LT
from routerd.sim.run import run as run_sim

DEMO = load_topology(config.load(None))


def path_links(topo: Any, a: str, b: str) -> list[int]:
    nh = topo.spt_next_hops()
    x, d = topo.index[a], topo.index[b]
    out = []
    while x != d:
        y = int(nh[x, d])
        out.append(topo.link_index[(x, y)])
        x = y
    return out


def flows(tmp_path: Any, times: list[float]) -> str:
    p = tmp_path / "flows.csv"
    p.write_text("time,source,destination,bytes\n" + "".join(f"{t},w1,e3,1000\n" for t in times))
    return str(p)


def test_a_delay_change_moves_delivery_by_exactly_the_change(tmp_path: Any) -> None:
    links = path_links(DEMO, "w1", "e3")
    trunk = DEMO.link("w3", "e3")
    assert trunk in links
    lt = tmp_path / "links.csv"
    lt.write_text("t_s,from,to,delay_s,mean_s,samples\n"
                  "0.5,w3,e3,0.005,0.006,12\n"
                  "1.5,w3,e3,0.002,0.003,9\n")
    base = sum(8000.0 / DEMO.capacity_bps[k] + DEMO.delay_s[k] for k in links)
    d0, d1, d2 = base, base + 0.005 - DEMO.delay_s[trunk], base + 0.002 - DEMO.delay_s[trunk]
    res = run_sim({"policy": "shortest", "traffic": flows(tmp_path, [0.0, 1.0, 2.0]),
                   "link_trace": str(lt), "warmup_s": 0.0, "seed": 1, "duration_s": None})
    s = res["summary"]
    assert s["delivered"] == 3 and s["link_trace_changes"] == 2
    assert s["max_delivery_s"] == pytest.approx(d1, rel=1e-12)
    assert s["mean_delivery_s"] == pytest.approx((d0 + d1 + d2) / 3, rel=1e-12)
    # --speed divides the link trace's times like the trace's: both changes come earlier
    res = run_sim({"policy": "shortest", "traffic": flows(tmp_path, [0.0, 0.9, 2.0]),
                   "link_trace": str(lt), "warmup_s": 0.0, "seed": 1, "duration_s": None,
                   "trace_speed": 2.0})
    # packets at 0, 0.45, 1.0 and changes at 0.25, 0.75 (unscaled changes would give d0, d0, d1)
    assert res["summary"]["mean_delivery_s"] == pytest.approx((d0 + d1 + d2) / 3, rel=1e-12)


def test_no_row_yet_means_the_topology_delay(tmp_path: Any) -> None:
    lt = tmp_path / "links.csv"
    lt.write_text("t_s,from,to,delay_s\n5,w3,e3,0.05\n")
    links = path_links(DEMO, "w1", "e3")
    base = sum(8000.0 / DEMO.capacity_bps[k] + DEMO.delay_s[k] for k in links)
    res = run_sim({"policy": "shortest", "traffic": flows(tmp_path, [0.0]), "link_trace": str(lt),
                   "warmup_s": 0.0, "seed": 1, "duration_s": None})
    assert res["summary"]["mean_delivery_s"] == pytest.approx(base, rel=1e-12)


def test_load_sorts_and_reports_every_bad_row(tmp_path: Any) -> None:
    ok = tmp_path / "ok.csv"
    ok.write_text("delay_s,to,from,t_s\n0.002,e3,w3,2\n0.001,w3,e3,1\n")
    tr = LT.load(str(ok), DEMO)
    assert [t for t, _, _ in tr.changes] == [1.0, 2.0] and tr.links == 2
    ev = tr.events(speed=2.0)
    assert [e.t for e in ev] == [0.5, 1.0] and ev[0].action == "delay" and ev[0].delay_s == 0.001
    bad = tmp_path / "bad.csv"
    bad.write_text("t_s,from,to,delay_s\n"
                   "1,w3,e3,0.001\n"
                   "1,w3,zz,0.001\n"      # line 3: no such node
                   "1,w1,e3,0.001\n"      # line 4: no such link
                   "x,w3,e3,0.001\n"      # line 5
                   "1,w3,e3,-1\n"         # line 6
                   "2,w3\n")              # line 7
    with pytest.raises(InputError) as ei:
        LT.load(str(bad), DEMO)
    msg = str(ei.value)
    for line in (3, 4, 5, 6, 7):
        assert f"{bad}:{line}:" in msg, line
    assert "'zz' is not a node" in msg and "'w1->e3' is not a link" in msg
    dup = tmp_path / "dup.csv"
    dup.write_text("t_s,from,to,delay_s\n1,w3,e3,0.001\n1,w3,e3,0.002\n")
    with pytest.raises(InputError, match=rf"{dup}:3: .*second delay at this time \(first at line 2\)"):
        LT.load(str(dup), DEMO)
    hdr = tmp_path / "hdr.csv"
    hdr.write_text("time,a,b,d\n")
    with pytest.raises(InputError, match="lacks the column"):
        LT.load(str(hdr), DEMO)
