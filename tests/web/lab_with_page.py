"""A lab of in-process emulated boxes with its status page, as a process of its own, for
tests that end the lab from outside (SIGTERM, SIGKILL) and watch its page's process.

    python lab_with_page.py LAB.yaml DB
"""

from __future__ import annotations

import asyncio
import sys

from server.lab.config import load_lab
from server.lab.page_process import run_lab_with_page
from server.lab.supervisor import Lab
from server.store.writer import Store


def main(config_path: str, db: str) -> int:
    config = load_lab(config_path)
    store = Store.open(db)
    lab = Lab(config, store, say=lambda text: print(text, flush=True), in_process_boxes=True)
    try:
        runs = asyncio.run(run_lab_with_page(lab, db, config.web, minutes=3, port=0))
    finally:
        store.close()
    print("ended: " + ", ".join(run.ended.reason for run in runs if run.ended), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(*sys.argv[1:]))
