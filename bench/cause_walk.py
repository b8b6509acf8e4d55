"""Walk issue 13's "Done when" in a running demo with Chromium, as a person would click.

    make demo   # or: manage.py seed_demo, then a server
    .venv/bin/python bench/cause_walk.py http://127.0.0.1:8000 PASSWORD [--out DIR]

Signs in as the demo's ``lead``, opens Forward camera 1.5, clicks the "images behind it"
link of its failing bay-night pedestrian rule, reads the list's AP of both versions and
the kind of error that grew most, opens the first image (the largest loss) and reads
the boxes 1.5 missed that 1.4 found; then downloads both versions' records (CSV) and
checks the list's counts for that image and each changed box's outcome against the
rows there. Prints each click's page time (wall, server and browser), writes
screenshots of every page at 1280 and 390 px to ``--out`` and exits 1 when a check
fails. Needs Debian's chromium (/usr/bin/chromium) and Playwright (requirements-dev).
"""

import argparse
import csv
import io
import pathlib
import sys
import time

CHROMIUM = "/usr/bin/chromium"


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("base", help="the demo server, e.g. http://127.0.0.1:8000")
    parser.add_argument("password", help="the demo users' password (seed_demo prints it)")
    parser.add_argument("--out", default="test-artifacts/cause-walk")
    args = parser.parse_args()
    out = pathlib.Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    from playwright.sync_api import sync_playwright

    clicks, failures = [], []

    def timed(name, action):
        started = time.perf_counter()
        action()
        clicks.append((name, time.perf_counter() - started))
        print(f"{name}: {clicks[-1][1]:.2f} s")

    def check(ok, what):
        print(("ok   " if ok else "FAIL ") + what)
        if not ok:
            failures.append(what)

    def shots(page, name):
        for width, height in ((1280, 900), (390, 844)):
            page.set_viewport_size({"width": width, "height": height})
            tall = page.evaluate("document.documentElement.scrollHeight")
            page.screenshot(
                path=str(out / f"{name}-{width}.png"),
                full_page=True,
                clip=None if tall <= 6000 else {"x": 0, "y": 0, "width": width, "height": 6000},
            )
            wide = page.evaluate("document.documentElement.scrollWidth")
            check(wide <= width, f"{name} at {width} px: no sideways scrolling ({wide} px)")
        page.set_viewport_size({"width": 1280, "height": 900})

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        context = browser.new_context(viewport={"width": 1280, "height": 900})
        page = context.new_page()

        def sign_in():
            page.goto(f"{args.base}/login/")
            page.fill("#id_username", "lead")
            page.fill("#id_password", args.password)
            page.click("button[type=submit]")
            page.wait_for_selector("h1")

        timed("sign in", sign_in)

        def follow(name, exact=False):
            def click():
                before = page.url
                page.get_by_role("link", name=name, exact=exact).first.click()
                page.wait_for_url(lambda url: url != before)
                page.wait_for_load_state()

            return click

        timed("Forward camera", follow("Forward camera"))
        timed("version 1.5", follow("1.5", exact=True))
        page.wait_for_selector("#outcomes")
        shots(page, "1-version")
        rows = page.locator("#outcomes tbody tr")
        texts = rows.all_inner_texts()
        failing = [
            i for i, t in enumerate(texts) if "fail" in t and "pedestrian" in t and "night" in t
        ]
        check(bool(failing), "1.5 has a failing bay-night pedestrian rule")
        print("  rule:", texts[failing[0]].replace("\n", " ").replace("\t", " | "))

        def to_list():
            rows.nth(failing[0]).locator("a.cause-link").click()
            page.wait_for_selector("#image-rows")

        timed("images behind it", to_list)
        list_url = page.url
        check(page.locator("select[name=class]").input_value() == "pedestrian", "list filtered")
        print("  ", page.locator("#list-summary-title").inner_text())
        print("  ", page.locator("#list-ap").inner_text())
        grew = page.locator("#list-kinds tr.grew th").inner_text().split()[0]
        print("   grew most:", grew)
        check(grew == "missed", "the kind of error that grew most for pedestrians: missed")
        shots(page, "2-list")
        first = page.locator("#image-rows tbody tr").first.locator("td").all_inner_texts()
        image_id = first[0]

        def to_image():
            page.locator("#image-rows tbody tr").first.locator("a").first.click()
            page.wait_for_selector("#frame-candidate g.boxes rect")

        timed("the largest loss's image", to_image)
        lost = [r.split("\t") for r in page.locator("#lost-rows tr").all_inner_texts()]
        for row in lost:
            print("   ", " | ".join(row))
        check(
            any(r[3].startswith("missed") and r[4].startswith("found") for r in lost),
            "pedestrians 1.5 missed that 1.4 found are listed",
        )
        shots(page, "3-drilldown")

        # Every number traceable to the downloads: the list row of that image, the boxes.
        page.goto(list_url)
        links = page.locator("#list-records a").evaluate_all(
            "els => els.map(e => [e.textContent, e.href])"
        )
        downloads = {
            label.split(",")[0]: list(csv.DictReader(io.StringIO(context.request.get(href).text())))
            for label, href in links
            if "/records." in href
        }
        threshold = 0.5  # the demo suite's deployed cut for pedestrians
        for column, label in ((3, "1.5"), (6, "1.4")):
            mine = [
                r
                for r in downloads[label]
                if r["image_id"] == image_id and r["class"] == "pedestrian"
            ]
            kept = [r for r in mine if r["row"] == "detection" and float(r["score"]) >= threshold]
            found = {r["box_id"] for r in kept if r["outcome"] == "tp"}
            boxes = {r["box_id"]: r for r in mine if r["row"] == "box"}
            counts = [
                sum(r["outcome"] == "tp" for r in kept),
                sum(r["outcome"] == "fp" for r in kept),
                sum(1 for k, r in boxes.items() if r["outcome"] != "ignored" and k not in found),
            ]
            listed = [int(v) for v in first[column : column + 3]]
            check(counts == listed, f"{label}'s TP/FP/missed of image {image_id}: {listed} = CSV")
            for row in lost:
                state = "found" if row[0] in found else "missed"
                side = row[3] if label == "1.5" else row[4]
                check(side.startswith(state), f"box {row[0]} {state} by {label} in its CSV")
        browser.close()
    total = sum(seconds for _, seconds in clicks)
    print(f"\n{len(clicks)} clicks, {total:.1f} s of page loads (reading time not included)")
    print("all checks hold" if not failures else f"FAILED: {len(failures)} checks")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
