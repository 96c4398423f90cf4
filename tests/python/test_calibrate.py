"""`tickmark calibrate` and tickmark.CalibrationRun as a user runs them.

The plot's PNG is checked against outside references: every chunk's CRC
against Python's zlib.crc32, the image data against zlib.decompress, and the
file as a whole by opening it with PIL (Debian's python3-pil, which
python3-matplotlib brings): its size, mode, and the fitted curves' colours.
"""

from __future__ import annotations

import json
import math
import random
import struct
import zlib

import pytest
from google.protobuf import json_format

import tickmark
from tickmark.v1 import records_pb2
from test_cli import tm

PIL = pytest.importorskip("PIL.Image")

# The plot's palette by fit index (clients/cli/plot/calibration_plot.cc, FitColour).
PALETTE = [(31, 119, 180), (230, 120, 10), (44, 160, 44), (214, 39, 40), (148, 103, 189)]
WIDTH, HEIGHT = 900, 560


def _chunks(png: bytes):
    """(type, data, stored crc) of each chunk; the PNG layout (W3C PNG §5.3)."""
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature, W3C PNG §5.2
    at, out = 8, []
    while at < len(png):
        (length,) = struct.unpack(">I", png[at:at + 4])
        kind, data = png[at + 4:at + 8], png[at + 8:at + 8 + length]
        (crc,) = struct.unpack(">I", png[at + 8 + length:at + 12 + length])
        out.append((kind, data, crc))
        at += 12 + length
    return out


def _calibration(delays):
    """A calibration as the server would send it, with three fits (hand-made)."""
    n = len(delays)
    logs = [math.log(d) for d in delays]
    mu = sum(logs) / n
    sigma = math.sqrt(sum((x - mu) ** 2 for x in logs) / n)
    mean = sum(delays) / n
    c = records_pb2.Calibration(id="c-0badcafe", trainer="ava", run="r1", valid=n, moves=n + 2,
                                missed=2, min_answers=40, ks_threshold=1.36 / math.sqrt(n),
                                delays_s=delays, chosen=1,
                                warnings=["too few answers: 30 valid, 40 wanted"])
    c.fits.add(family="gamma", parameters=2, kernel_description="gamma:4,%r" % (mean / 4),
               aic=20.0, log_likelihood=-8.0, ks_distance=0.1, mean_s=mean, p90_s=1.0)
    c.fits.add(family="lognormal", parameters=2,
               kernel_description="lognormal:%r,%r" % (mu, sigma), aic=18.0,
               log_likelihood=-7.0, ks_distance=0.08, mean_s=mean, p90_s=0.9)
    c.fits.add(family="exgauss", parameters=3, kernel_description="exgauss:0.35,0.05,0.2",
               aic=19.5, log_likelihood=-6.75, ks_distance=0.09, mean_s=0.55, p90_s=0.95)
    c.fits.add(family="lognormal-mixture", parameters=5, error="did not converge")
    c.kernel_description = c.fits[1].kernel_description
    return c


def test_plot_png_matches_zlib_and_opens_in_pil(tmp_path, server):
    rng = random.Random(5)
    delays = [0.15 + math.exp(rng.gauss(-0.92, 0.45)) for _ in range(30)]
    saved = tmp_path / "cal.json"
    saved.write_text(json_format.MessageToJson(_calibration(delays)))
    out = tmp_path / "cal.png"
    p = tm(server, "calibrate", "plot", str(saved), "--out", str(out))
    assert "plot written" in p.stderr
    png = out.read_bytes()
    chunks = _chunks(png)
    assert [k for k, _, _ in chunks] == [b"IHDR", b"IDAT", b"IEND"]
    for kind, data, crc in chunks:
        assert crc == zlib.crc32(kind + data)  # Python zlib.crc32, the CRC PNG specifies
    width, height, depth, colour = struct.unpack(">IIBB", chunks[0][1][:10])
    assert (width, height, depth, colour) == (WIDTH, HEIGHT, 8, 2)
    raw = zlib.decompress(chunks[1][1])  # Python zlib.decompress reads our deflate stream
    row = 1 + 3 * width
    assert len(raw) == row * height
    assert all(raw[y * row] == 0 for y in range(height))  # filter type 0 on every scanline

    image = PIL.open(out)  # PIL, an independent PNG decoder
    image.load()
    assert image.size == (WIDTH, HEIGHT) and image.mode == "RGB"
    # PIL's pixels are the bytes we wrote.
    assert image.tobytes() == b"".join(raw[y * row + 1:(y + 1) * row] for y in range(height))
    counts = {}
    for pixel in image.getdata():
        counts[pixel] = counts.get(pixel, 0) + 1
    # Each fit that has a kernel is drawn in its colour; the chosen one (thick) most.
    for i in range(3):
        assert counts.get(PALETTE[i], 0) > 200, f"fit {i} colour {PALETTE[i]} missing"
    assert counts[PALETTE[1]] > counts[PALETTE[0]]
    assert counts.get(PALETTE[3], 0) == 0  # the failed fit is not drawn


def test_plot_refuses_what_is_not_a_calibration(tmp_path, server):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    p = tm(server, "calibrate", "plot", str(bad), "--out", str(tmp_path / "x.png"), check=False)
    assert p.returncode == 2 and "not a calibration" in p.stderr
    p = tm(server, "calibrate", "show", check=False)
    assert p.returncode == 2 and "--trainer" in p.stderr


def _scripted_run(address, token_file, delays, practice=2):
    """Moves and answers in real time, the answer `delay` after each move."""
    import time
    with tickmark.CalibrationRun(address, token_file=token_file, client_id="pytest-cal") as run:
        signs = [i % 3 != 0 for i in range(practice + len(delays))]
        for i, verdict in enumerate(signs):
            shown = run.clock()
            run.move(verdict, shown_ns=shown, practice=i < practice)
            d = delays[i - practice] if i >= practice else 0.3
            time.sleep(d)  # pacing the scripted trainer, not waiting for a result
            run.answer(verdict, at_ns=shown + int(d * 1e9), input="key:g")
            time.sleep(0.05)
        return run.finish(min_answers=10, display_note="pytest: no display")


def test_calibrate_new_run_show_list_apply_and_pin(server, tmp_path):
    token = tmp_path / "ava.token"
    out = tm(server, "calibrate", "new", "--trainer", "ava", "--token-out", str(token)).stdout
    assert "tickmark-keys --calibrate --token-file " + str(token) in out
    assert "--server " + server.address in out
    rng = random.Random(9)
    delays = [round(0.15 + math.exp(rng.gauss(-1.0, 0.4)), 3) for _ in range(12)]
    cal = _scripted_run(server.address, str(token), delays)
    assert cal.trainer == "ava" and cal.valid == 12 and cal.id.startswith("c-")
    # The delays are answer minus move on the source clock: exactly what was scripted.
    assert sorted(cal.delays_s) == pytest.approx(sorted(delays), abs=1e-6)

    shown = tm(server, "calibrate", "show", "--trainer", "ava", "--plot",
               str(tmp_path / "ava.png")).stdout
    assert "calibration  " + cal.id in shown and "valid 12" in shown
    for fit in cal.fits:
        assert fit.family in shown
    assert "* " + cal.fits[cal.chosen].family in shown
    image = PIL.open(tmp_path / "ava.png")
    assert image.size == (WIDTH, HEIGHT)
    as_json = json.loads(tm(server, "calibrate", "show", cal.id, "--json").stdout)
    assert as_json["id"] == cal.id and as_json["valid"] == 12
    listed = tm(server, "calibrate", "list", "--trainer", "ava").stdout
    assert cal.id in listed and "ava" in listed

    session, admin = server.session(title="after calibration")
    applied = tm(server, "calibrate", "apply", cal.id, "--session", session, "--weight", "2").stdout
    assert "trainer ava" in applied and "from calibration " + cal.id in applied
    replay = tm(server, "replay", "--session", session, "--name", "cal", "--calibrated").stdout
    assert "derived set 'cal'" in replay

    pinned = tm(server, "session", "create", "--title", "pinned", "--pin-kernels").stdout
    pinned_id = pinned.split()[1]
    assert "kernels    pinned" in tm(server, "session", "show", pinned_id).stdout
    assert "pinned" not in tm(server, "session", "show", session).stdout


def test_a_run_with_too_few_answers_raises_calibration_failed(server, tmp_path):
    token = tmp_path / "ben.token"
    tm(server, "calibrate", "new", "--trainer", "ben", "--token-out", str(token))
    with tickmark.CalibrationRun(server.address, token_file=str(token)) as run:
        shown = run.clock() - 1_000_000_000  # a second ago: both times are in the past
        run.move(True, shown_ns=shown)
        run.answer(True, at_ns=shown + 400_000_000)
        with pytest.raises(tickmark.CalibrationFailed) as failed:
            run.finish()
    assert failed.value.code != 0 and failed.value.message
    listed = tm(server, "calibrate", "list", "--trainer", "ben").stdout
    assert "(no calibrations)" in listed
