"""The demo's service step: start `towers serve` on a run, ask it as a web page would, stop it.

    .venv/bin/python scripts/demo_service.py RUN_DIR CUSTOMER_ID

Prints the model description's main lines and one customer's list (in stock only, with names), both
from HTTP answers on 127.0.0.1; the server runs on a free port and is stopped at the end.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import urllib.request


def ask(base: str, path: str, body: dict | None = None) -> dict:
    data = None if body is None else json.dumps(body).encode()
    request = urllib.request.Request(base + path, data=data, headers={"content-type": "application/json"})
    with urllib.request.urlopen(request, timeout=30) as answer:
        return json.loads(answer.read())


def main(run_dir: str, customer: str) -> int:
    server = subprocess.Popen([sys.executable, "-m", "towers", "serve", run_dir, "--port", "0"],
                              stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    try:
        first = server.stdout.readline()
        found = re.search(r"http://\S+", first)
        if not found:
            print(f"the server did not start: {first.strip()}", file=sys.stderr)
            return 1
        base = found.group(0)
        print(first.strip())
        print(f"GET {base}/health ->", json.dumps(ask(base, "/health")))
        model = ask(base, "/model")
        print(f"GET {base}/model -> k {model['model']['k']}, score: {model['model']['score']}")
        body = {"users": [customer], "top": 5, "columns": ["name"], "keep": {"only_true": ["in_stock"]}}
        print(f"POST {base}/recommend {json.dumps(body)} ->")
        for entry in ask(base, "/recommend", body)["lists"]:
            for item in entry["items"]:
                print(f"  {entry['query_id']}  {item['rank']:>2}  {item['item_id']}  {item['score']:.3f}  {item['name']}")
    finally:
        server.terminate()
        server.wait(timeout=30)
    print("server stopped")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(*sys.argv[1:3]))
