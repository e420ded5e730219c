"""Drives the dashboard in Debian's headless Chromium with Playwright against a running henrybook server.

Called by tests/service/dashboard_browser.rs, which starts the real server and makes the tokens. This script loads
the demo data through the public API (parts, then every sweep of demo-data/manifest.json), then works
through the pages as a person would and prints one JSON object with what it saw; the Rust test asserts
on it. Screenshots of every page go to the directory given.

usage: browser_dashboard.py BASE_URL SCREENSHOT_DIR   (tokens in HB_ENGINEER_TOKEN, HB_INSPECTOR_TOKEN,
       HB_READER_TOKEN; the demo in HB_DEMO_DIR)
"""

import json
import os
import sys
import time
import urllib.error
import urllib.request
import uuid

from playwright.sync_api import sync_playwright

BASE = sys.argv[1].rstrip("/")
SHOTS = sys.argv[2]
ENGINEER = os.environ["HB_ENGINEER_TOKEN"]
INSPECTOR = os.environ["HB_INSPECTOR_TOKEN"]
READER = os.environ["HB_READER_TOKEN"]
DEMO = os.environ["HB_DEMO_DIR"]
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-quic",
]
os.makedirs(SHOTS, exist_ok=True)
facts = {}


def log(msg):
    print(f"[browser] {msg}", file=sys.stderr, flush=True)


# ------------------------------------------------------------------ the API, as a design tool would use it


def call(method, path, token, body=None, form=None):
    headers = {"Authorization": f"Bearer {token}", "Accept": "application/json"}
    data = None
    if form is not None:
        boundary = uuid.uuid4().hex
        parts = []
        for name, value in form.items():
            if isinstance(value, tuple):
                filename, content = value
                parts.append(
                    f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"; filename="{filename}"\r\n'
                    f"Content-Type: application/octet-stream\r\n\r\n".encode() + content + b"\r\n"
                )
            else:
                parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n{value}\r\n'.encode())
        data = b"".join(parts) + f"--{boundary}--\r\n".encode()
        headers["Content-Type"] = f"multipart/form-data; boundary={boundary}"
    elif body is not None:
        data = json.dumps(body).encode()
        headers["Content-Type"] = "application/json"
    req = urllib.request.Request(BASE + "/api/v1" + path, data=data, method=method, headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=30) as res:
            text = res.read()
            return res.status, (json.loads(text) if text else None)
    except urllib.error.HTTPError as e:
        text = e.read()
        try:
            return e.code, json.loads(text)
        except ValueError:
            return e.code, text.decode(errors="replace")


def load_demo():
    with open(os.path.join(DEMO, "manifest.json")) as fh:
        manifest = json.load(fh)
    fit_ids = []
    for part in manifest["parts"]:
        status, answer = call(
            "POST",
            "/parts",
            ENGINEER,
            body={"part_number": part["part_number"], "description": part.get("description", ""), "limits": part.get("limits") or {}},
        )
        assert status in (201, 409), f"creating part {part['part_number']}: {status} {answer}"
        for sw in part["sweeps"]:
            with open(os.path.join(DEMO, sw["file"]), "rb") as fh:
                content = fh.read()
            form = {"part_number": part["part_number"], "lot": sw["lot"], "method": sw["method"]}
            for key in ("z0_ohm", "dcr_ohm", "temperature_c", "operator"):
                if sw.get(key) is not None:
                    form[key] = str(sw[key])
            form["file"] = (os.path.basename(sw["file"]), content)
            status, answer = call("POST", "/sweeps", INSPECTOR, form=form)
            assert status == 202, f"uploading {sw['file']}: {status} {answer}"
            fit_ids.append(answer["fit_id"])
    facts["demo_parts"] = [p["part_number"] for p in manifest["parts"]]
    facts["demo_fit_ids"] = fit_ids
    return manifest, fit_ids


# ------------------------------------------------------------------ the browser


def sign_in(page, token, expect_role):
    page.goto(BASE + "/ui/sign-in")
    page.fill("#token", token)
    page.click("#sign-in-form button[type=submit]")
    page.wait_for_selector(f'.role[data-role="{expect_role}"]')


def counts(page):
    return {
        st: int(page.text_content(f'[data-count="{st}"] .n') or "-1")
        if (page.text_content(f'[data-count="{st}"] .n') or "").strip().isdigit()
        else -1
        for st in ("queued", "running", "succeeded", "failed", "cancelled")
    }


def series_facts(page, plot_id):
    """What each series path of one plot holds: its point count, its d length, its number of subpaths."""
    return page.eval_on_selector_all(
        f'[data-plot="{plot_id}"] path[data-series]',
        """els => Object.fromEntries(els.map(e => [e.dataset.series, {
            points: Number(e.dataset.points), d_length: (e.getAttribute('d') || '').length,
            moves: ((e.getAttribute('d') || '').match(/M/g) || []).length,
            lines: ((e.getAttribute('d') || '').match(/L/g) || []).length }]))""",
    )


def main():
    manifest, fit_ids = load_demo()
    n_fits = len(fit_ids)
    log(f"uploaded {n_fits} demo sweeps")
    console = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=CHROMIUM_FLAGS)
        eng = browser.new_context(viewport={"width": 1280, "height": 900})
        page = eng.new_page()
        page.on("console", lambda m: console.append(f"{m.type}: {m.text}") if m.type == "error" else None)
        page.on("pageerror", lambda e: console.append(f"pageerror: {e}"))
        requests = []
        page.on("request", lambda r: requests.append(r.url) if "/api/v1/" in r.url else None)

        # --- queue: the page itself must show every demo fit reaching a final state
        sign_in(page, ENGINEER, "engineer")
        page.wait_for_selector('[data-count="succeeded"] .n')
        snapshots = []
        deadline = time.time() + float(os.environ.get("HB_QUEUE_TIMEOUT_S", "240"))
        while time.time() < deadline:
            c = counts(page)
            snapshots.append(c)
            if c["queued"] == 0 and c["running"] == 0 and c["succeeded"] + c["failed"] + c["cancelled"] >= n_fits:
                break
            page.wait_for_timeout(500)
        facts["queue_first"] = snapshots[0]
        facts["queue_final"] = snapshots[-1]
        facts["queue_saw_unfinished"] = any(s["queued"] + s["running"] > 0 for s in snapshots)
        page.wait_for_timeout(2500)  # one more poll so the tables match the counts
        facts["queue_polls"] = sum(1 for u in requests if u.endswith("/api/v1/queue"))
        facts["queue_rows"] = page.eval_on_selector_all("#recent tr[data-fit-id]", "els => els.map(e => ({id: e.dataset.fitId, status: e.dataset.status}))")
        facts["queue_error_rows"] = page.eval_on_selector_all("#recent tr.error-row", "els => els.map(e => e.textContent)")
        page.screenshot(path=f"{SHOTS}/queue.png", full_page=True)

        # --- the fits as the API reports them
        details = {fid: call("GET", f"/fits/{fid}", READER)[1] for fid in fit_ids}
        succeeded = [fid for fid, d in details.items() if d["status"] == "succeeded"]
        failed = [fid for fid, d in details.items() if d["status"] == "failed"]
        facts["api_statuses"] = {str(fid): d["status"] for fid, d in details.items()}
        assert succeeded, f"no demo fit succeeded: {facts['api_statuses']}"
        fit_id = succeeded[0]
        _, curves = call("GET", f"/fits/{fit_id}/curves", READER)
        facts["fit_id"] = fit_id
        facts["curve_points"] = len(curves["frequency_hz"])
        facts["curve_model_points"] = len(curves["model_z_real_ohm"])

        # --- fit page: both curves drawn, markers, parameters, verdict, hover read-out
        page.goto(f"{BASE}/ui/fits/{fit_id}")
        page.wait_for_selector('[data-plot="plot-mag"] path[data-series="model"]')
        facts["fit_plots"] = {pid: series_facts(page, pid) for pid in ("plot-mag", "plot-phase", "plot-residual", "plot-leff", "plot-q")}
        facts["fit_markers"] = page.eval_on_selector_all('[data-plot="plot-mag"] [data-marker]', "els => els.map(e => e.dataset.marker)")
        facts["fit_srf_hz"] = (details[fit_id].get("report") or {}).get("derived", {}).get("srf_hz")
        facts["fit_param_rows"] = page.eval_on_selector_all("#parameters tr[data-param]", "els => els.map(e => [e.dataset.param, e.dataset.identifiable])")
        facts["fit_check_rows"] = page.eval_on_selector_all("#verdict tr[data-check]", "els => els.map(e => e.dataset.check)")
        facts["fit_api_checks"] = [c["limit"] for c in details[fit_id].get("verdict_checks") or []]
        facts["fit_downloads"] = page.eval_on_selector_all("[data-download^='/']", "els => els.map(e => e.dataset.download)")
        facts["fit_plot_downloads"] = page.eval_on_selector_all("#plots [data-download]", "els => els.map(e => e.dataset.download)")
        facts["fit_x_ticks"] = page.eval_on_selector_all('[data-plot="plot-mag"] text.tick-x', "els => els.map(e => e.textContent)")
        box = page.locator('[data-plot="plot-mag"]').bounding_box()
        page.mouse.move(box["x"] + box["width"] * 0.45, box["y"] + box["height"] * 0.5)
        page.wait_for_selector("#plot-mag .readout:not([hidden])")
        facts["fit_y_ticks"] = page.eval_on_selector_all('[data-plot="plot-mag"] text.tick-y', "els => els.map(e => e.textContent)")
        facts["fit_readout"] = page.text_content("#plot-mag .readout")
        try:
            with page.expect_download(timeout=20000) as dl:
                page.click(f'[data-download="/fits/{fit_id}/model.json"]')
            with open(dl.value.path(), "rb") as fh:
                body = fh.read()
            facts["model_download_bytes"] = len(body)
            facts["model_download_kind"] = json.loads(body).get("kind")
        except Exception as e:  # reported, and failed on, by the Rust test
            facts["model_download_bytes"] = 0
            facts["model_download_problem"] = f"{e}; page says: {page.text_content('#fit-actions .form-status')}"
        try:
            with page.expect_download(timeout=20000) as dl:
                page.click(f'[data-download="/fits/{fit_id}/netlist.cir"]')
            with open(dl.value.path(), "r", encoding="utf-8") as fh:
                text = fh.read()
            lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not ln.strip().startswith("*")]
            facts["netlist_subckt"] = next((ln for ln in lines if ln.upper().startswith(".SUBCKT")), None)
            facts["netlist_ends"] = any(ln.upper().startswith(".ENDS") for ln in lines)
            facts["netlist_element_letters"] = sorted({ln[0].upper() for ln in lines if not ln.startswith(".")})
        except Exception as e:  # reported, and failed on, by the Rust test
            facts["netlist_subckt"] = None
            facts["netlist_problem"] = f"{e}; page says: {page.text_content('#fit-actions .form-status')}"
        page.screenshot(path=f"{SHOTS}/fit.png", full_page=True)

        if failed:
            page.goto(f"{BASE}/ui/fits/{failed[0]}")
            page.wait_for_selector("#fit-error")
            facts["failed_fit_text"] = page.text_content("#fit-error .error-text")
            facts["failed_fit_api_error"] = details[failed[0]]["error"]
            page.screenshot(path=f"{SHOTS}/fit-failed.png", full_page=True)

        # The page's own SI formatting and parsing, run in the browser on values with known answers.
        # Source: Thomson formula, 10 µH with 5 pF -> 22.5079 MHz (TOOLBOX reference values); the rest
        # are SI prefix definitions (BIPM SI Brochure, 9th ed., table 7).
        facts["si_checks"] = page.evaluate(
            """async () => {
                const m = await import('/ui/assets/si.js');
                return {
                  srf: m.si(1 / (2 * Math.PI * Math.sqrt(10e-6 * 5e-12)), 'Hz'),
                  l: m.si(4.7e-6, 'H'), c: m.si(5e-12, 'F'), r: m.si(0.0123, 'ohm'),
                  parse_l: m.parseSI('4.7 µH', 'H'), parse_f: m.parseSI('30M', 'Hz'),
                  parse_r: m.parseSI('50 mΩ', 'Ω'), parse_plain: m.parseSI('3e7', 'Hz'),
                  parse_bad: (() => { try { m.parseSI('thirty', 'Hz'); return 'accepted'; } catch (e) { return e.message; } })(),
                };
            }"""
        )

        # --- parts: the filters are the registry's own query parameters
        requests.clear()
        page.goto(f"{BASE}/ui/parts")
        page.wait_for_selector("#parts tr[data-part]")
        facts["parts_rows"] = page.eval_on_selector_all("#parts tr[data-part]", "els => els.map(e => e.dataset.part)")
        page.screenshot(path=f"{SHOTS}/parts.png", full_page=True)

        # --- part page as an engineer: approve the succeeded fit with a reason
        part_number = details[fit_id]["part_number"]
        page.goto(f"{BASE}/ui/parts/{urllib.request.quote(part_number, safe='')}")
        page.wait_for_selector("#part-fits")
        facts["engineer_approve_buttons"] = page.locator('[data-do="approve"]').count()
        facts["engineer_edit_limits"] = page.locator("#edit-limits").count()
        facts["part_safety_note"] = page.locator("[data-safety]").count()
        reason = "demo lot matches the datasheet; browser test approval"
        page.click(f'tr[data-fit-id="{fit_id}"] [data-do="approve"]')
        page.fill(f'tr[data-fit-id="{fit_id}"] input[name="reason"]', reason)
        # A fit that fails its limits or whose model is poor is approved only with the override box.
        override = page.locator(f'tr[data-fit-id="{fit_id}"] input[name="override"]')
        facts["approve_override_offered"] = override.count()
        facts["approve_needs_override"] = details[fit_id].get("verdict") == "fail" or details[fit_id].get("quality") == "poor"
        if override.count():
            override.check()
        page.click(f'tr[data-fit-id="{fit_id}"] form[data-action="approve"] button[type=submit]')
        page.wait_for_selector(f'#audit tr[data-action*="approve"]:has-text("{reason}")', timeout=15000)
        facts["audit_after_approve"] = page.eval_on_selector_all("#audit tbody tr", "els => els.map(e => e.textContent)")
        facts["api_approval_after"] = call("GET", f"/fits/{fit_id}", READER)[1]["approval"]
        page.screenshot(path=f"{SHOTS}/part-engineer.png", full_page=True)

        # Approved-only filter through the UI: the page must send the registry's own parameter.
        requests.clear()
        page.goto(f"{BASE}/ui/parts")
        page.wait_for_selector("#parts tr[data-part]")
        page.check("#approved-only")
        page.wait_for_function("() => location.search.includes('approved_only=true')")
        page.wait_for_timeout(1200)
        facts["parts_approved_rows"] = page.eval_on_selector_all("#parts tr[data-part]", "els => els.map(e => e.dataset.part)")
        facts["parts_requests"] = [u[len(BASE):] for u in requests if "/api/v1/parts" in u]

        # --- a part's history across lots: the engineer releases the lots the manifest marks (as the demo
        # does), then the part page shows trend plots with control limits and the drifting lot flagged.
        history_part = next(p for p in manifest["parts"] if sum(1 for sw in p["sweeps"] if sw.get("approve")) >= 2)
        hp = history_part["part_number"]
        by_lot = {details[fid]["lot"]: fid for fid in fit_ids if details[fid]["part_number"] == hp}
        for sw in history_part["sweeps"]:
            fid = by_lot.get(sw["lot"])
            if sw.get("approve") and fid in succeeded and call("GET", f"/fits/{fid}", READER)[1]["approval"] != "approved":
                st, ans = call("POST", f"/fits/{fid}/approve", ENGINEER, body={"reason": "lot released (browser test)"})
                assert st == 200, f"approving {sw['lot']}: {st} {ans}"
        facts["history_part"] = hp
        facts["history_lots_in_manifest"] = [sw["lot"] for sw in history_part["sweeps"]]
        page.goto(f"{BASE}/ui/parts/{urllib.request.quote(hp, safe='')}")
        page.wait_for_selector('#history [data-plot="trend-l0_h"] path[data-series="value"]', timeout=30000)
        facts["history_figures"] = page.eval_on_selector_all("#history .trend[data-figure]", "els => els.map(e => e.dataset.figure)")
        facts["history_l0_series"] = series_facts(page, "trend-l0_h")
        facts["history_flags"] = page.eval_on_selector_all('#history .trend[data-figure="l0_h"] li[data-flag-lot]', "els => els.map(e => e.dataset.flagLot)")
        facts["history_lot_rows"] = page.eval_on_selector_all("#lot-history tr[data-lot]", "els => els.map(e => e.dataset.lot)")
        facts["history_report_links"] = page.locator("#lot-history [data-report]").count()
        facts["history_x_ticks"] = page.eval_on_selector_all('[data-plot="trend-l0_h"] text.tick-x', "els => els.map(e => e.textContent)")
        page.locator("#history").screenshot(path=f"{SHOTS}/part-history.png")
        # Downloads of a trend plot (SVG, PNG).
        downloads = {}
        for kind in ("svg", "png"):
            try:
                with page.expect_download(timeout=20000) as dl:
                    page.click(f'#history .trend[data-figure="l0_h"] [data-download="{kind}"]')
                with open(dl.value.path(), "rb") as fh:
                    body = fh.read()
                downloads[kind] = {"name": dl.value.suggested_filename, "bytes": len(body), "head": body[:8].hex(),
                                   "has_polyline_or_path": b"<path" in body}
            except Exception as e:  # reported, and failed on, by the Rust test
                downloads[kind] = {"problem": str(e)}
        # The overlay: the drifting (last) lot against the baseline, |Z|, L(f) and Q(f).
        last_lot = history_part["sweeps"][-1]["lot"]
        page.check(f'#lot-history input[data-lot="{last_lot}"]')
        page.click("#show-overlay")
        page.wait_for_selector('#overlay [data-plot="overlay-q"] path[data-series]', timeout=30000)
        facts["overlay_plots"] = {pid: series_facts(page, pid) for pid in ("overlay-zmag", "overlay-l", "overlay-q")}
        try:
            with page.expect_download(timeout=20000) as dl:
                page.click('#overlay [data-download="csv"] >> nth=0')
            with open(dl.value.path(), "r", encoding="utf-8") as fh:
                lines = fh.read().splitlines()
            downloads["csv"] = {"name": dl.value.suggested_filename, "header": lines[0], "rows": len(lines) - 1}
        except Exception as e:
            downloads["csv"] = {"problem": str(e)}
        facts["history_downloads"] = downloads
        page.locator("#overlay").screenshot(path=f"{SHOTS}/part-overlay.png")
        # The dashboard's own report link: a new tab showing the page from a blob (it needs the token),
        # styled although the dashboard's content security policy forbids inline styles but this one.
        last_fit = by_lot[last_lot]
        with page.context.expect_page(timeout=20000) as popup:
            page.click(f'#lot-history [data-report="{last_fit}"]')
        tab = popup.value
        tab.wait_for_selector("h1", timeout=20000)
        facts["report_tab"] = {
            "url_scheme": tab.url.split(":")[0],
            "title": tab.text_content("h1"),
            "status_display": tab.evaluate("getComputedStyle(document.querySelector('.status')).display"),
        }
        tab.close()

        # --- the printable report of the failing lot: opened as the dashboard's link does (the page with
        # the token), printed to PDF by Chromium, and the service's own PDF download read back.
        failing = [fid for fid in succeeded if details[fid].get("verdict") == "fail"]
        report_fit = failing[0] if failing else succeeded[-1]
        facts["report_fit"] = {"fit_id": report_fit, "part": details[report_fit]["part_number"], "lot": details[report_fit]["lot"],
                               "verdict": details[report_fit].get("verdict")}
        rep = browser.new_context(viewport={"width": 1100, "height": 900}, extra_http_headers={"Authorization": f"Bearer {READER}"})
        rp = rep.new_page()
        rp.goto(f"{BASE}/api/v1/fits/{report_fit}/report")
        rp.wait_for_selector("svg.chart polyline")
        facts["report_html_svgs"] = rp.locator("svg.chart").count()
        rp.screenshot(path=f"{SHOTS}/report.png", full_page=True)
        rp.emulate_media(media="print")
        rp.pdf(path=f"{SHOTS}/report-printed.pdf", format="A4", print_background=True)
        rep.close()
        from pypdf import PdfReader

        printed = PdfReader(f"{SHOTS}/report-printed.pdf")
        facts["printed_pdf_pages"] = len(printed.pages)
        facts["printed_pdf_page1_text"] = printed.pages[0].extract_text()
        req = urllib.request.Request(f"{BASE}/api/v1/fits/{report_fit}/report.pdf", headers={"Authorization": f"Bearer {READER}"})
        with urllib.request.urlopen(req, timeout=60) as res:
            own = res.read()
            facts["own_pdf_type"] = res.headers.get("Content-Type")
        with open(f"{SHOTS}/report-download.pdf", "wb") as fh:
            fh.write(own)
        own_pdf = PdfReader(f"{SHOTS}/report-download.pdf", strict=True)
        facts["own_pdf_pages"] = len(own_pdf.pages)
        facts["own_pdf_text"] = "\n".join(pg.extract_text() for pg in own_pdf.pages)

        # --- upload a bad file: the page must show the error in words
        page.goto(f"{BASE}/ui/upload")
        page.wait_for_selector("#upload-form")
        facts["upload_safety_note"] = page.locator("[data-safety]").count()
        page.fill("#up-part", part_number)
        page.fill("#up-lot", "BAD-LOT-1")
        page.select_option("#up-method", "reflection")
        bad = b"! not a sweep\n# Hz S RI R 50\n1e6 0.5 0.1\n2e6 banana 0.2\n"
        page.set_input_files("#up-file", files=[{"name": "broken.s1p", "mimeType": "application/octet-stream", "buffer": bad}])
        page.click("#up-submit")
        page.wait_for_selector("#upload-result .error", timeout=60000)
        facts["upload_error_text"] = page.text_content("#upload-result .error")
        page.screenshot(path=f"{SHOTS}/upload-bad-file.png", full_page=True)

        # --- a reader: no approve buttons, no limit editing, and the API refuses anyway
        rdr = browser.new_context(viewport={"width": 1280, "height": 900})
        rpage = rdr.new_page()
        rpage.on("console", lambda m: console.append(f"reader {m.type}: {m.text}") if m.type == "error" else None)
        rpage.on("pageerror", lambda e: console.append(f"reader pageerror: {e}"))
        sign_in(rpage, READER, "reader")
        rpage.goto(f"{BASE}/ui/parts/{urllib.request.quote(part_number, safe='')}")
        rpage.wait_for_selector("#part-fits")
        facts["reader_approve_buttons"] = rpage.locator('[data-do="approve"], [data-do="reject"]').count()
        facts["reader_edit_limits"] = rpage.locator("#edit-limits").count()
        facts["reader_note"] = rpage.locator("#read-only-note").count()
        rpage.screenshot(path=f"{SHOTS}/part-reader.png", full_page=True)
        rpage.goto(f"{BASE}/ui/fits/{fit_id}")
        rpage.wait_for_selector('[data-plot="plot-mag"]')
        facts["reader_fit_approve_buttons"] = rpage.locator('[data-do="approve"], [data-do="reject"]').count()
        status, answer = call("POST", f"/fits/{fit_id}/reject", READER, body={"reason": "a reader tries"})
        facts["reader_api_reject"] = {"status": status, "type": (answer or {}).get("type") if isinstance(answer, dict) else None}
        rpage.goto(f"{BASE}/ui/upload")
        rpage.wait_for_selector("#upload-refused")
        facts["reader_upload_form"] = rpage.locator("#upload-form").count()
        browser.close()
    # A refused request is logged by Chromium as "Failed to load resource"; the pages show those themselves.
    facts["console_errors"] = [c for c in console if "Failed to load resource" not in c]
    print(json.dumps(facts))


if __name__ == "__main__":
    main()
