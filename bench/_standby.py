"""The driver of bench/standby: top_items throughput on a primary and on its hot standby,
measured alternately in one run. Run by bench/standby inside its throwaway cluster (the primary).
"""

import argparse
import json
import os
import re
import subprocess
import sys
import types

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "tests"))
import _bench as B  # noqa: E402
import _clusters  # noqa: E402

ap = argparse.ArgumentParser()
ap.add_argument("--users", type=int, default=100_000)
ap.add_argument("--items", type=int, default=20_000)
ap.add_argument("--rows", type=int, default=1_000_000)
ap.add_argument("--factors", type=int, default=64)
ap.add_argument("--seconds", type=int, default=10, help="length of each pgbench run")
ap.add_argument("--rounds", type=int, default=3)
ap.add_argument("--clients", default="1,2")
ap.add_argument("--json")
args = ap.parse_args()

NAME = "bench_standby"


def pgbench(host, port, script, clients):
    """Transactions per second (excluding connections) of one pgbench run."""
    r = subprocess.run(["pgbench", "-n", "-h", host, "-p", str(port), "-c", str(clients),
                        "-j", str(clients), "-T", str(args.seconds), "-f", script,
                        os.environ.get("PGDATABASE", "affinity_bench")],
                       capture_output=True, text=True)
    if r.returncode != 0:
        sys.exit("pgbench failed:\n" + r.stdout + r.stderr)
    m = re.search(r"tps = ([0-9.]+) \(without initial connection time\)", r.stdout)
    if not m:
        sys.exit("no tps in pgbench's output:\n" + r.stdout)
    return float(m.group(1))


def main():
    res = {"args": vars(args)}
    conn = B.connect()
    B.query(conn, "SET synchronous_commit = on")     # the refresh's commit is in the WAL at once
    res["machine"] = m = B.machine(conn)
    B.log("== machine: %s CPUs (%s), %s; OpenBLAS core %s; load %s"
          % (m["nproc"], m["cpu"], m["postgres"].split(",")[0], m["blas_core"], B.loadavg()))
    B.log("== checkout %s (%s)" % (m["git"]["head"], m["git"]["subject"]))
    res["data"] = B.generate("purchases_standby", args.rows, args.users, args.items)
    B.query(conn, "SELECT affinity.define_model(%s, 'SELECT user_id, item_id, weight FROM "
                  "public.purchases_standby', %s::jsonb)",
            (NAME, json.dumps({"factors": args.factors, "iterations": 2, "threads": 2})))
    secs, rows = B.timed(conn, "SELECT affinity.refresh(%s)", (NAME,))
    stats = rows[0][0]
    B.log("  refreshed %s in %.1f s: %s users, %s items, %.0f MB"
          % (NAME, secs, stats["users"], stats["items"], stats["size_bytes"] / 1e6))
    res["model"] = stats

    primary = types.SimpleNamespace(sock=os.environ["PGHOST"], port=int(os.environ["PGPORT"]))
    standby = _clusters.Cluster("standby").basebackup_of(primary, ["hot_standby_feedback = on"])
    standby.start()
    sconn = standby.wait_ready(os.environ.get("PGDATABASE", "affinity_bench"))
    waited = _clusters.wait_replay(conn, sconn)
    B.log("  hot standby on port %d, replayed in %.2f s" % (standby.port, waited))
    check = ("SELECT md5(string_agg(item_id || ':' || score, ',' ORDER BY rank)) FROM "
             "affinity.top_items(affinity.get_model('%s'), 4242, 10)" % NAME)
    same = B.one(conn, check) == B.one(sconn, check)
    B.log("  the standby's top 10 for customer 4242 equals the primary's: %s" % same)
    res["same_answer"] = same

    script = os.path.join(B.WORK, "standby_top_items.sql")
    with open(script, "w") as fh:
        fh.write("\\set u random(1, %d)\n"
                 "SELECT r.item_id, r.score, r.rank FROM "
                 "affinity.top_items(affinity.get_model('%s'), :u, 10) r;\n" % (args.users, NAME))
    servers = [("primary", primary.sock, primary.port), ("standby", standby.sock, standby.port)]
    res["runs"] = []
    for clients in [int(x) for x in args.clients.split(",")]:
        for rnd in range(args.rounds):
            tps = {}
            # alternate which server goes first, so that drift in the machine's load cancels
            order = servers if rnd % 2 == 0 else servers[::-1]
            for label, host, port in order:
                tps[label] = pgbench(host, port, script, clients)
            ratio = tps["standby"] / tps["primary"]
            B.log("  clients %d, round %d: primary %.0f tps, standby %.0f tps, standby/primary %.3f "
                  "(load %s)" % (clients, rnd + 1, tps["primary"], tps["standby"], ratio, B.loadavg()))
            res["runs"].append({"clients": clients, "round": rnd + 1, "primary_tps": tps["primary"],
                                "standby_tps": tps["standby"], "ratio": ratio,
                                "load": B.loadavg()})
    sconn.close()
    standby.remove()
    if args.json:
        B.write_json(args.json, res)


main()
