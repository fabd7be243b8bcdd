#!/usr/bin/env bash
# Renders a riffle report.html in headless Chromium (Debian's `chromium`
# package) with the network blocked, then checks that
#   1. the HTML itself names no outside resource,
#   2. the page asked the network for nothing (Chromium's net log), and
#   3. the screenshot is not blank (PNG decoded with the python3 standard
#      library: enough pixels differ from the background, several colours).
# Usage: tests/browser/check_report.sh path/to/report.html
set -euo pipefail
html=${1:?usage: check_report.sh REPORT.html}
[ -f "$html" ] || { echo "check_report: no file $html" >&2; exit 1; }
html=$(realpath "$html")
browser=$(command -v chromium || command -v chromium-browser || true)
[ -n "$browser" ] || { echo "check_report: chromium not found (apt-get install -y chromium)" >&2; exit 1; }
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

if grep -Eqi 'https?://|<link|<script|<iframe|<img|src=|url\(|@import' "$html"; then
  echo "check_report: $html refers to an outside resource:" >&2
  grep -Enoi 'https?://[^" ]*|<link[^>]*|<script[^>]*|<iframe|<img|src=[^ >]*|url\([^)]*|@import' "$html" | head >&2
  exit 1
fi

timeout 180 "$browser" --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
  --disable-background-networking --disable-component-update --disable-sync \
  --disable-default-apps --user-data-dir="$work/profile" \
  --host-resolver-rules="MAP * ~NOTFOUND" --proxy-server=127.0.0.1:9 \
  --log-net-log="$work/net.json" --window-size=1200,2400 \
  --screenshot="$work/page.png" "file://$html" >"$work/chromium.log" 2>&1 || {
  echo "check_report: chromium failed:" >&2; tail -20 "$work/chromium.log" >&2; exit 1; }

python3 - "$work/page.png" "$work/net.json" <<'PY'
import json, struct, sys, zlib

png_path, net_path = sys.argv[1], sys.argv[2]

# Requests made on behalf of the page carry the file:// page's isolation
# key; the browser's own background requests (update checks) do not.
net = json.load(open(net_path))
names = {v: k for k, v in net["constants"]["logEventTypes"].items()}
outside = []
for event in net["events"]:
    params = event.get("params") or {}
    if names.get(event["type"]) != "URL_REQUEST_START_JOB" or "url" not in params:
        continue
    if "file://" in str(params.get("network_isolation_key", "")) and not params["url"].startswith(("file:", "data:")):
        outside.append(params["url"])
if outside:
    sys.exit("check_report: the page requested outside resources: %s" % outside[:5])

# PNG decoding (RFC 2083): IHDR, concatenated IDAT, per-row filters.
data = open(png_path, "rb").read()
if data[:8] != b"\x89PNG\r\n\x1a\n":
    sys.exit("check_report: screenshot is not a PNG")
pos, idat = 8, b""
while pos < len(data):
    length, kind = struct.unpack(">I4s", data[pos:pos + 8])
    body = data[pos + 8:pos + 8 + length]
    if kind == b"IHDR":
        width, height, depth, colour = struct.unpack(">IIBB", body[:10])
    elif kind == b"IDAT":
        idat += body
    pos += 12 + length
if depth != 8 or colour not in (2, 6):
    sys.exit("check_report: unexpected PNG type depth=%d colour=%d" % (depth, colour))
channels = 3 if colour == 2 else 4
stride = width * channels
raw = zlib.decompress(idat)
rows, prev = [], bytearray(stride)
for y in range(height):
    f = raw[y * (stride + 1)]
    line = bytearray(raw[y * (stride + 1) + 1:(y + 1) * (stride + 1)])
    for i in range(stride):
        a = line[i - channels] if i >= channels else 0
        b = prev[i]
        c = prev[i - channels] if i >= channels else 0
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
    rows.append(bytes(line))
    prev = line
background = rows[0][:3]
differ, colours = 0, set()
for line in rows[::4]:
    for x in range(0, stride, channels * 4):
        pixel = line[x:x + 3]
        colours.add(pixel)
        if pixel != background:
            differ += 1
sampled = ((height + 3) // 4) * ((width + 3) // 4)
share = differ / sampled
print("check_report: %dx%d screenshot, %.1f%% of sampled pixels differ from the background, %d colours"
      % (width, height, 100 * share, len(colours)))
if share < 0.02 or len(colours) < 8:
    sys.exit("check_report: the screenshot looks blank")
PY
echo "check_report: $html renders offline and requests nothing outside"
