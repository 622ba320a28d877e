"""The review page's API on a 100,000-row manifest: building the review lists, pages near the
start, middle and end of each list, and writing a decision, measured side by side over HTTP on
127.0.0.1 (the cost a browser sees, less rendering).

The manifest is bench_report_export's synthetic one (5 classes, 3 % of rows in near-duplicate
pairs, some issue codes); no image is read (previews are per file, not per row).

Run: python benchmarks/review_scale.py [--rows 100000] [--repeats 20]
"""

from __future__ import annotations

import argparse
import http.client
import json
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from bench_report_export import synthetic_manifest  # noqa: E402

from labelprep import decisions, manifest  # noqa: E402
from labelprep.reviews import make_server  # noqa: E402
from labelprep.reviews.queue import Queue  # noqa: E402


def timed_request(server, method, path, body=None, repeats=1):
    """Median seconds of ``repeats`` requests, and the last response's JSON."""
    times = []
    for _ in range(repeats):
        conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=60)
        headers = {"X-Review-Token": server.token}
        data = None
        if body is not None:
            data = json.dumps(body).encode()
            headers["Content-Type"] = "application/json"
        start = time.perf_counter()
        conn.request(method, path, body=data, headers=headers)
        response = conn.getresponse()
        payload = response.read()
        times.append(time.perf_counter() - start)
        conn.close()
        assert response.status == 200, payload[:200]
    return statistics.median(times), json.loads(payload)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--repeats", type=int, default=20)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    m = synthetic_manifest(args.rows, rng)
    with tempfile.TemporaryDirectory() as work:
        out = Path(work)
        manifest.write(m, out / "manifest.csv")
        start = time.perf_counter()
        queue = Queue(manifest.read(out / "manifest.csv"))
        t_queue = time.perf_counter() - start
        server = make_server(out)
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        counts = queue.counts()
        print(f"review API, {args.rows:,} rows: {counts['clusters']:,} clusters, "
              f"{counts['conflicts']:,} label conflicts, {counts['files']:,} flagged files "
              f"(median of {args.repeats} requests each)")
        print(f"  build the review lists           {t_queue * 1000:8.1f} ms (once per manifest load)")
        for tab in ("clusters", "conflicts", "files"):
            total = counts[tab]
            for where, offset in (("start", 0), ("middle", total // 2), ("end", max(total - 50, 0))):
                t, page = timed_request(server, "GET", f"/api/items?tab={tab}&offset={offset}&limit=50",
                                        repeats=args.repeats)
                print(f"  {tab:<9} page of 50 at the {where:<6} {t * 1000:8.1f} ms "
                      f"({len(page['items'])} items)")
        t_summary, _ = timed_request(server, "GET", "/api/summary", repeats=args.repeats)
        print(f"  summary                          {t_summary * 1000:8.1f} ms")
        for existing in (0, 1000):
            rows = [{"path": p, "action": "drop", "value": "", "note": "", "line": 0}
                    for p in m["path"].iloc[1:existing + 1]]
            if rows:
                import pandas as pd

                decisions.save(pd.DataFrame(rows), server.decisions_path)
            server.load()
            t, _ = timed_request(server, "POST", "/api/decide",
                                 body={"row": 0, "action": "keep", "note": "bench"}, repeats=args.repeats)
            print(f"  decide (file holds {existing:>4} decisions) {t * 1000:6.1f} ms (atomic write included)")
        server.shutdown()
        server.server_close()


if __name__ == "__main__":
    main()
