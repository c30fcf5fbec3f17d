#!/usr/bin/env python3
"""PAGES clients of the live page, as browsers behave: each holds /events and, on every
`changed` event, fetches the overview's live part. Prints the events and fetches at the end.

    python3 bench/page_clients.py PORT PAGES
"""
import http.client
import signal
import sys
import threading

port, pages = int(sys.argv[1]), int(sys.argv[2])
counts = {"events": 0, "fetches": 0, "bytes": 0}
lock = threading.Lock()


def client():
    ev = http.client.HTTPConnection("127.0.0.1", port)
    ev.request("GET", "/events", headers={"Accept": "text/event-stream"})
    stream = ev.getresponse()
    page = http.client.HTTPConnection("127.0.0.1", port)
    while True:
        line = stream.readline()
        if not line:
            return
        if line.startswith(b"event: changed"):
            page.request("GET", "/?fragment=1")
            body = page.getresponse().read()
            with lock:
                counts["events"] += 1
                counts["fetches"] += 1
                counts["bytes"] += len(body)


def report(*_):
    print(f"{pages} pages: {counts['events']} events, {counts['fetches']} fetches, "
          f"{counts['bytes'] // 1024} KiB of pages", flush=True)
    sys.exit(0)


signal.signal(signal.SIGTERM, report)
for _ in range(pages):
    threading.Thread(target=client, daemon=True).start()
signal.pause()
