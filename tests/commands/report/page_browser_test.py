#!/usr/bin/env python3
"""The report page in a real browser (Debian's chromium, headless), driven over the
Chrome DevTools Protocol on a pipe (--remote-debugging-pipe: JSON messages ended by
NUL on file descriptors 3 and 4; the protocol is Chromium's published one).

Checks, on a run folder made here (simulate, extract, report):
  - the page loads from file:// with every network request refused (a proxy that
    does not exist), with no console error, no exception and no request other than
    the page itself and data: URIs;
  - every plot, colour bar, cut-out and the viewer canvas is not blank (pixel
    variance of an element screenshot);
  - zooming with the mouse wheel on a component changes the view (zoom state,
    pyramid level, canvas pixels) down to full resolution; hovering and clicking a
    component show its catalogue row; switching the map changes the canvas; a
    gallery button moves the viewer.

Usage: page_browser_test.py SKERRY_BINARY WORK_DIR
Exit 0 pass, 1 fail, 77 skipped (no chromium; SKERRY_REQUIRE_BROWSER=1 makes it a failure).
Screenshots go to $SKERRY_REPORT_SHOTS when that is set.
"""
import json
import os
import shutil
import struct
import subprocess
import sys
import tempfile
import time
import zlib

FAILS = []


def check(cond, what):
    print(("ok   " if cond else "FAIL ") + what, flush=True)
    if not cond:
        FAILS.append(what)


def decode_png(data):
    """8-bit RGB/RGBA non-interlaced PNG -> (width, height, channels, bytes) (PNG spec, ISO/IEC 15948)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    pos, idat, w = 8, b"", 0
    while pos < len(data):
        n, typ = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + n]
        if typ == b"IHDR":
            w, h, depth, ctype, _, _, inter = struct.unpack(">IIBBBBB", body)
            assert depth == 8 and ctype in (2, 6) and inter == 0, "unexpected PNG layout"
            ch = 3 if ctype == 2 else 4
        elif typ == b"IDAT":
            idat += body
        pos += 12 + n
    raw = zlib.decompress(idat)
    stride = w * ch
    out = bytearray(h * stride)
    prev = bytearray(stride)
    for y in range(h):
        f = raw[y * (stride + 1)]
        line = bytearray(raw[y * (stride + 1) + 1:(y + 1) * (stride + 1)])
        for i in range(stride):
            a = line[i - ch] if i >= ch else 0
            b = prev[i]
            c = prev[i - ch] if i >= ch else 0
            if f == 1:
                line[i] = (line[i] + a) & 255
            elif f == 2:
                line[i] = (line[i] + b) & 255
            elif f == 3:
                line[i] = (line[i] + (a + b) // 2) & 255
            elif f == 4:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                line[i] = (line[i] + (a if pa <= pb and pa <= pc else b if pb <= pc else c)) & 255
        out[y * stride:(y + 1) * stride] = line
        prev = line
    return w, h, ch, bytes(out)


def variance(png):
    w, h, ch, px = decode_png(png)
    vals = [px[i] for i in range(0, len(px), ch)] + [px[i + 1] for i in range(0, len(px), ch)]
    m = sum(vals) / len(vals)
    return sum((v - m) ** 2 for v in vals) / len(vals)


class Browser:
    def __init__(self, exe, profile):
        r_cmd, w_cmd = os.pipe()  # we write commands, the browser reads fd 3
        r_evt, w_evt = os.pipe()  # the browser writes fd 4, we read

        def child_fds():
            a, b = os.dup(r_cmd), os.dup(w_evt)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen(
            [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--user-data-dir=" + profile,
             "--proxy-server=127.0.0.1:9", "--remote-debugging-pipe", "about:blank"],
            preexec_fn=child_fds, close_fds=False, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(r_cmd)
        os.close(w_evt)
        self.w, self.r = w_cmd, r_evt
        self.buf, self.next_id, self.events, self.session = b"", 0, [], None

    def _read_message(self):
        while b"\0" not in self.buf:
            chunk = os.read(self.r, 1 << 20)
            if not chunk:
                raise RuntimeError("browser closed the pipe")
            self.buf += chunk
        msg, self.buf = self.buf.split(b"\0", 1)
        return json.loads(msg)

    def send(self, method, params=None, session=True):
        self.next_id += 1
        m = {"id": self.next_id, "method": method, "params": params or {}}
        if session and self.session:
            m["sessionId"] = self.session
        os.write(self.w, json.dumps(m).encode() + b"\0")
        while True:
            r = self._read_message()
            if r.get("id") == self.next_id:
                if "error" in r:
                    raise RuntimeError(method + ": " + json.dumps(r["error"]))
                return r.get("result", {})
            self.events.append(r)

    def wait_event(self, method, timeout=60):
        t0 = time.time()
        while time.time() - t0 < timeout:
            for i, e in enumerate(self.events):
                if e.get("method") == method:
                    return self.events.pop(i)
            self.events.append(self._read_message())
        raise RuntimeError("timeout waiting for " + method)

    def js(self, expr):
        r = self.send("Runtime.evaluate", {"expression": expr, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in r:
            raise RuntimeError("script error: " + json.dumps(r["exceptionDetails"])[:300])
        return r["result"].get("value")

    def settle(self):
        # Let lazily decoded tiles arrive and the canvas redraw (two animation frames after a pause).
        self.js("new Promise(r => setTimeout(() => requestAnimationFrame(() => requestAnimationFrame(r)), 300))")

    def shot(self, clip=None):
        p = {"format": "png", "captureBeyondViewport": True}
        if clip:
            p["clip"] = dict(clip, scale=1)
        import base64
        return base64.b64decode(self.send("Page.captureScreenshot", p)["data"])

    def close(self):
        try:
            self.send("Browser.close", session=False)
        except Exception:
            pass
        try:
            self.proc.wait(10)
        except subprocess.TimeoutExpired:
            self.proc.kill()


def run(cmd):
    r = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    if r.returncode != 0:
        print("command failed:", " ".join(cmd), r.stderr, file=sys.stderr)
        sys.exit(1)


def main():
    skerry, work = sys.argv[1], sys.argv[2]
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if not exe:
        if os.environ.get("SKERRY_REQUIRE_BROWSER") == "1":
            print("FAIL chromium not found but SKERRY_REQUIRE_BROWSER=1")
            return 1
        print("skipped: chromium not installed")
        return 77
    shots = os.environ.get("SKERRY_REPORT_SHOTS")
    shutil.rmtree(work, ignore_errors=True)
    os.makedirs(work)
    # A small field of the invented Lanternfish survey with some extended sources.
    run([skerry, "simulate", "--out", work, "--bands.freq_mhz", "1400", "--noise.rms_jy_per_beam", "2e-5",
         "--field.size_pix", "768", "--primary_beam.fwhm_deg", "0", "--background.amplitude_jy_per_beam", "0",
         "--bands.crpix_shift_pix", "0", "--output.name", "field", "--sources.count", "200"])
    run([skerry, "extract", os.path.join(work, "field_1400MHz.fits"), "--out", os.path.join(work, "run")])
    run([skerry, "report", os.path.join(work, "run")])
    page = os.path.join(work, "run", "field_1400MHz.report.html")
    profile = tempfile.mkdtemp(prefix="skerry-chromium-")
    b = Browser(exe, profile)
    try:
        t = b.send("Target.createTarget", {"url": "about:blank"}, session=False)
        b.session = b.send("Target.attachToTarget", {"targetId": t["targetId"], "flatten": True}, session=False)["sessionId"]
        for m in ("Runtime.enable", "Log.enable", "Page.enable", "Network.enable"):
            b.send(m)
        b.send("Emulation.setDeviceMetricsOverride", {"width": 1600, "height": 1200, "deviceScaleFactor": 1, "mobile": False})
        b.send("Page.navigate", {"url": "file://" + page})
        b.wait_event("Page.loadEventFired")
        b.settle()
        # ---- loads offline, cleanly
        errors, requests = [], []
        for e in b.events:
            m, p = e.get("method"), e.get("params", {})
            if m == "Runtime.exceptionThrown":
                errors.append(json.dumps(p)[:200])
            if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                errors.append(json.dumps(p)[:200])
            if m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                errors.append(json.dumps(p)[:200])
            if m == "Network.requestWillBeSent":
                requests.append(p["request"]["url"])
        check(not errors, "no console error or exception (%s)" % errors[:2])
        others = [u for u in requests if not u.startswith("data:") and u != "file://" + page]
        check(not others, "no request but the page itself and data: URIs (%s)" % others[:3])
        check(b.js("!!window.skerryViewer") is True, "viewer script ran")
        if shots:
            os.makedirs(shots, exist_ok=True)
            open(os.path.join(shots, "test-page.png"), "wb").write(b.shot())
        # ---- nothing blank
        boxes = b.js("""Array.from(document.querySelectorAll('svg[id^=plot-], svg.colourbar, #vw-canvas, .cpanel svg'))
            .filter(e => !e.closest('[hidden]')).slice(0, 80).map(e => { e.scrollIntoView(); const r = e.getBoundingClientRect();
            return {id: e.id || e.className.baseVal || e.tagName, x: r.left + scrollX, y: r.top + scrollY, width: r.width, height: r.height}; })""")
        check(len(boxes) >= 10, "found %d plots, bars, cut-outs and the canvas" % len(boxes))
        blank = []
        for bx in boxes:
            if bx["width"] < 4 or bx["height"] < 4:
                blank.append(bx["id"] + " (no size)")
                continue
            v = variance(b.shot({"x": bx["x"], "y": bx["y"], "width": bx["width"], "height": bx["height"]}))
            if v < 20:
                blank.append("%s (variance %.1f)" % (bx["id"], v))
        check(not blank, "every plot, colour bar, cut-out and the viewer is non-blank (%s)" % blank[:4])
        # ---- zoom on a component with the wheel
        b.js("document.getElementById('viewer').scrollIntoView()")
        b.settle()
        cv = b.js("(() => { const r = document.getElementById('vw-canvas').getBoundingClientRect(); return {x: r.left, y: r.top, w: r.width, h: r.height}; })()")
        clip = {"x": cv["x"] + b.js("scrollX"), "y": cv["y"] + b.js("scrollY"), "width": cv["w"], "height": cv["h"]}
        before = b.shot(clip)
        s0 = b.js("skerryViewer.state()")
        # The brightest component (largest catalogue flux is not needed: the first one will do).
        comp = b.js("skerryViewer.comps[0]")
        for _ in range(14):
            sx, sy = b.js("skerryViewer.toScreen(%f, %f)" % (comp[0], comp[1]))
            b.send("Input.dispatchMouseEvent", {"type": "mouseWheel", "x": cv["x"] + sx, "y": cv["y"] + sy, "deltaX": 0, "deltaY": -120})
        b.settle()
        s1 = b.js("skerryViewer.state()")
        after = b.shot(clip)
        check(s1["zoom"] > 8 * s0["zoom"], "wheel zoom: %.3f -> %.3f screen px per map pixel" % (s0["zoom"], s1["zoom"]))
        check(b.js("document.getElementById('vw-canvas').getAttribute('data-level')") == "0", "full-resolution level reached")
        check("level 0" in b.js("document.getElementById('vw-status').textContent"), "status: full resolution drawn at the component")
        check(after != before and variance(after) > 20, "zoomed canvas differs and is not blank")
        if shots:
            open(os.path.join(shots, "test-zoomed.png"), "wb").write(after)
        # ---- hover, then click a component: its catalogue row
        sx, sy = b.js("skerryViewer.toScreen(%f, %f)" % (comp[0], comp[1]))
        b.send("Input.dispatchMouseEvent", {"type": "mouseMoved", "x": cv["x"] + sx, "y": cv["y"] + sy})
        b.settle()
        check(b.js("document.getElementById('vw-row').getAttribute('data-row')") == str(comp[6]), "hover shows the component's row")
        b.send("Input.dispatchMouseEvent", {"type": "mousePressed", "x": cv["x"] + sx, "y": cv["y"] + sy, "button": "left", "clickCount": 1})
        b.send("Input.dispatchMouseEvent", {"type": "mouseReleased", "x": cv["x"] + sx, "y": cv["y"] + sy, "button": "left", "clickCount": 1})
        b.settle()
        st = b.js("skerryViewer.state()")
        row_text = b.js("document.getElementById('vw-row').textContent")
        check(st["selected"] == 0, "click selects the component")
        check(b.js("document.getElementById('vw-row').getAttribute('data-row')") == str(comp[6]) and "S_int [mJy]" in row_text,
              "click pins its catalogue row (%s...)" % row_text[:60])
        clicked = b.shot(clip)
        check(clicked != after, "the selected component is highlighted")
        if shots:
            open(os.path.join(shots, "test-clicked.png"), "wb").write(clicked)
        # ---- another map
        b.js("document.getElementById('vw-btn-residual').click()")
        b.settle()
        check(b.js("skerryViewer.state().layer") == "residual", "residual map selected")
        resid = b.shot(clip)
        check(resid != clicked and variance(resid) > 20, "residual view differs and is not blank")
        # ---- a gallery button moves the viewer
        n_goto = b.js("document.querySelectorAll('[data-goto]').length")
        check(n_goto > 0, "gallery has %d cut-outs with a viewer button" % n_goto)
        if n_goto:
            z0 = b.js("JSON.stringify(skerryViewer.state())")
            b.js("document.querySelectorAll('[data-goto]')[%d].click()" % (n_goto - 1))
            b.settle()
            check(b.js("JSON.stringify(skerryViewer.state())") != z0, "gallery button moves the viewer")
    finally:
        b.close()
        shutil.rmtree(profile, ignore_errors=True)
    if not FAILS:
        shutil.rmtree(work, ignore_errors=True)
    print("%d check(s) failed" % len(FAILS) if FAILS else "all checks passed")
    return 1 if FAILS else 0


if __name__ == "__main__":
    sys.exit(main())
