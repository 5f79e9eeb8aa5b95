"""Page-load benchmark of the dashboard in Debian's chromium: the time from navigation start
until every chart of a page is drawn, for the first chart page (cold browser cache) and for
later ones (plotly.js and our files in the cache).

    python -m benchmarks.page_load [--rounds 5]

Each round opens a fresh browser context (empty cache), loads the demo Survey cold, then the
Close-up, a Unit card, the Survey again and the Compare page warm. Prints per-page medians and a
JSON line. Targets (docs/dashboard.md): under 1 s cold, under 300 ms warm.
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import tempfile
import threading

ALL_DRAWN = ("() => [...document.querySelectorAll('.chart[data-figure]')]"
             ".every(el => el.dataset.drawn === 'yes')")


def serve_demo(folder: str) -> str:
    """The demo dashboard, every dump analysed, on a free loopback port."""
    import time

    import waitress

    from actdoc.web import create_app

    app = create_app(folder, demo=True)
    client = app.test_client()
    for dump in client.get("/api/dumps").get_json():
        while client.get(f"/api/dumps/{dump['id']}").get_json()["status"] in ("queued",
                                                                               "analysing"):
            time.sleep(0.1)
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=server.run, daemon=True).start()
    return f"http://127.0.0.1:{server.effective_port}"


def page_addresses(base: str) -> dict[str, str]:
    import urllib.request

    with urllib.request.urlopen(base + "/api/dumps") as response:
        dumps = {dump["name"]: dump for dump in json.load(response)}
    survey = dumps["logistic_deep_old_init.h5"]["page"]
    first, last = dumps["relu_dying_step1.h5"]["id"], dumps["relu_dying_step5.h5"]["id"]
    return {"survey": survey, "close-up": survey + "/layers/1",
            "unit-card": survey + "/layers/1/units/3", "compare": f"/compare?dump={first}&dump={last}"}


def drawn_ms(page, url: str) -> float:
    page.goto(url)
    page.wait_for_function(ALL_DRAWN, timeout=60_000)
    return page.evaluate("performance.now()")


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args(argv)
    from playwright.sync_api import sync_playwright

    folder = tempfile.mkdtemp(prefix="actdoc-page-load-")
    try:
        base = serve_demo(folder)
        pages = page_addresses(base)
        times: dict[str, list[float]] = {"cold survey": []}
        with sync_playwright() as playwright:
            browser = playwright.chromium.launch(executable_path=shutil.which("chromium"),
                                                 args=["--headless", "--no-sandbox"])
            for _round in range(args.rounds):
                context = browser.new_context(viewport={"width": 1440, "height": 900})
                page = context.new_page()
                times["cold survey"].append(drawn_ms(page, base + pages["survey"]))
                for kind in ("close-up", "unit-card", "survey", "compare"):
                    times.setdefault(f"warm {kind}", []).append(
                        drawn_ms(page, base + pages[kind]))
                context.close()
            browser.close()
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    medians = {kind: round(statistics.median(values)) for kind, values in times.items()}
    for kind, value in medians.items():
        print(f"{kind:18s} {value:6d} ms  (of {len(times[kind])})")
    print(json.dumps({"median_ms": medians, "rounds": args.rounds}))
    return medians


if __name__ == "__main__":
    main()
