"""Tests of webapp.sheet: recipes that reproduce a conversion bit for bit, and design sheets.

Outside references used here:
* SHA-256 (FIPS 180-4) through hashlib: "byte-identical" means equal digests of the files.
* The recipe schema is checked against JSON Schema draft 2020-12 with the general-purpose
  ``jsonschema`` package (its metaschema and its validator), and our hand-written validator must
  agree with it on every broken recipe below.
* HTML: Python's html.parser (tags must balance); the browser test lives in tests/browser.
* Plotted filter responses are compared with scipy.signal.freqz of the same taps; the blind-trial
  p-value with scipy.stats.binomtest (one-sided binomial test).
* Physics: the Welch spectrum of a sampled 1 kHz sine peaks at 1 kHz; nothing of a 48 kHz
  output lies above its Nyquist frequency of 24 kHz.
"""

import copy
import hashlib
import html.parser
import json
import os

import numpy as np
import pytest
import soundfile as sf
from scipy import signal, stats

from webapp import __version__, jobs, sheet
from webapp import recipe as recipe_module
from webapp.delivery import Delivery
from webapp.cli import main
from webapp.jsontools import jsonable
from webapp.dsp.errors import ParameterError
from webapp.dsp.spec import Spec
from webapp.recipe import load_recipe, recipe_from_result, write_recipe
from webapp.sheet import sheet_html, write_sheet

RATE_IN = 44100
TONES_HZ = (1000.0, 6000.0)


def _sha(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def _source(path, *, rate=RATE_IN, seconds=1.5, seed=20261201):
    """A real stereo 24-bit WAV: two sines plus a little noise (deterministic)."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(rate * seconds)) / rate
    left = 0.4 * np.sin(2 * np.pi * TONES_HZ[0] * t)
    right = 0.25 * np.sin(2 * np.pi * TONES_HZ[1] * t) + 0.01 * rng.standard_normal(t.size)
    sf.write(path, np.stack([left, right], axis=1), rate, subtype="PCM_24")
    return path


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


class _Doc(html.parser.HTMLParser):
    """Collects scripts by id, attributes, and checks that tags balance."""

    VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta",
            "source", "track", "wbr"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.attrs, self.scripts, self.tags = [], [], [], {}, []
        self._script = None
        self.text = []
        self.cells = {}          # data-key -> shown text
        self._cell = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append((tag, dict(attrs)))
        if tag == "script":
            self._script = (dict(attrs).get("id") or f"script-{len(self.scripts)}", [])
        if tag == "td" and dict(attrs).get("data-key"):
            self._cell = (dict(attrs)["data-key"], [])
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self.cells[self._cell[0]] = "".join(self._cell[1])
            self._cell = None
        if tag == "script" and self._script is not None:
            self.scripts[self._script[0]] = "".join(self._script[1])
            self._script = None
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
            return
        self.stack.pop()

    def handle_data(self, data):
        if self._script is not None:
            self._script[1].append(data)
        else:
            self.text.append(data)
            if self._cell is not None:
                self._cell[1].append(data)


def _parse(text):
    doc = _Doc()
    doc.feed(text)
    doc.close()
    return doc


def _at(figures, dotted):
    value = figures
    for part in dotted.split("."):
        value = value[int(part)] if isinstance(value, list) else value[part]
    return value


# --------------------------------------------------------------------------------------------
# one real conversion through the command, shared by the module

@pytest.fixture(scope="module")
def converted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sheet")
    src = _source(folder / "interview.wav")
    out = folder / "interview_48k.wav"
    recipe = folder / "interview.recipe.json"
    html_path = folder / "interview.html"
    code = main(["convert", str(src), str(out), "--to", "48000", "--preset", "music_delivery",
                 "--bits", "16", "--dither",
                 "tpdf", "--seed", "7", "--ceiling", "-1", "--write-recipe", str(recipe),
                 "--sheet", str(html_path), "--title", "Episode 12", "--quiet"])
    assert code == 0
    result = jobs.convert_file(src, folder / "api_48k.wav", spec=Spec(), fs_out=48000,
                                   delivery=Delivery(bits="16", dither_seed=7,
                                                              ceiling_dbtp=-1.0))
    return dict(folder=folder, src=src, out=out, recipe=recipe, sheet=html_path, result=result)


@pytest.fixture(scope="module")
def page(converted):
    """A sheet of the API result (audit skipped: the audit has its own tests)."""
    text = sheet_html(converted["result"], title="Episode 12 <final>", author="R. Mixer",
                      note="Checked on the\nstudio monitors.", audit=None,
                      blind={"trials": 16, "correct": 12})
    return text, _parse(text)


# --------------------------------------------------------------------------------------------
# recipes: reproduction

def test_convert_with_recipe_reproduces_the_output_bit_for_bit(converted, tmp_path, capsys):
    again = tmp_path / "again.wav"
    code, _, err = _run(capsys, "convert", converted["src"], again, "--recipe",
                        converted["recipe"], "--quiet")
    assert code == 0, err
    data = json.loads(open(converted["recipe"]).read())
    assert _sha(again) == _sha(converted["out"]) == data["output"]["sha256"]
    assert _sha(converted["src"]) == data["source"]["sha256"]
    # the API conversion with the same options wrote the very same bytes
    assert converted["result"].output_sha256 == data["output"]["sha256"]
    # and the command says so
    code, out, err = _run(capsys, "convert", converted["src"], tmp_path / "third.wav", "--recipe",
                          converted["recipe"], "--json")
    assert code == 0, err
    assert json.loads(out)["recipe"]["reproduces"] is True


def test_recipe_with_a_different_source_gives_the_clear_error(converted, tmp_path, capsys):
    other = _source(tmp_path / "other.wav", seed=5)
    code, _, err = _run(capsys, "convert", other, tmp_path / "o.wav", "--recipe",
                        converted["recipe"], "--quiet")
    assert code == 2
    assert err.startswith("rateferry: error: the recipe was made from 'interview.wav'")
    assert "'other.wav' has sha256" in err and "a different file" in err
    recipe = load_recipe(converted["recipe"])
    with pytest.raises(ParameterError, match="a different file") as exc:
        recipe.check_source(other)          # a path is hashed: usable before converting
    assert exc.value.field == "source"
    assert recipe.check_source(converted["src"]) is True
    assert recipe.check_source(converted["result"]) is True


def test_recipe_re_run_through_the_pipeline_matches_and_reports_it(converted, tmp_path):
    r = load_recipe(converted["recipe"])
    res = jobs.convert_file(converted["src"], tmp_path / "p.wav", spec=r.spec,
                                fs_out=r.fs_out, delivery=r.delivery, block_frames=r.block_frames)
    assert r.reproduces(res)
    assert res.output_sha256 == r.output_sha256 == _sha(tmp_path / "p.wav")
    changed = jobs.convert_file(converted["src"], tmp_path / "q.wav", spec=r.spec,
                                    fs_out=r.fs_out,
                                    delivery=Delivery(bits="16", dither_seed=8,
                                                               ceiling_dbtp=-1.0))
    assert not r.reproduces(changed)   # another dither seed: other bytes


def test_multistage_recipe_reproduces_and_the_sheet_lists_the_stages(tmp_path, capsys):
    src = _source(tmp_path / "src.wav", seconds=1.0)
    out, rec, sh = tmp_path / "o8k.wav", tmp_path / "r.json", tmp_path / "s.html"
    code, _, err = _run(capsys, "convert", src, out, "--to", "8000", "--stages", "auto",
                        "--write-recipe", rec, "--sheet", sh, "--quiet")
    assert code == 0, err
    data = json.load(open(rec))
    assert data["design"]["path"] == "multistage" and len(data["design"]["stages"]) >= 2
    assert data["spec"]["stages"] == "auto"
    code, _, err = _run(capsys, "convert", src, tmp_path / "again.wav", "--recipe", rec,
                        "--quiet")
    assert code == 0, err
    assert _sha(tmp_path / "again.wav") == _sha(out) == data["output"]["sha256"]
    doc = _parse(open(sh, encoding="utf-8").read())
    cells = {a.get("data-key"): json.loads(a["data-value"]) for t, a in doc.attrs
             if t == "td" and "data-key" in a}
    for i, stage in enumerate(data["design"]["stages"]):
        assert cells[f"stages.{i}.numtaps"] == stage["numtaps"]
        assert cells[f"stages.{i}.measured.stopband_attenuation_db"] == \
            stage["measured"]["stopband_attenuation_db"]


# --------------------------------------------------------------------------------------------
# recipes: contents and schema

def test_recipe_holds_everything_needed_and_base_names_only(converted):
    text = open(converted["recipe"], encoding="utf-8").read()
    data = json.loads(text)
    res = converted["result"]
    assert (data["schema"], data["version"]) == ("rateferry-recipe", 2)
    assert data["software"] == {"name": "rateferry", "version": __version__}
    assert data["route"] == {"fs_in": 44100, "fs_out": 48000, "up": 160, "down": 147}
    assert data["spec"] == Spec().to_dict()
    assert data["delivery"] == {"bits": "16", "dither": "tpdf", "dither_seed": 7,
                                "ceiling_dbtp": -1.0, "loudness_lufs": None,
                                "loudness_tolerance_lu": None, "limiter": False,
                                "max_limiting_db": 6.0, "channel_layout": "keep",
                                "mono_law": "half", "pick_channel": 1, "mp3_kbps": None,
                                "mp3_mode": "constant"}
    assert data["filter_applied"] is True and data["write_passes"] == 1
    assert data["block_frames"] == jobs.BLOCK_FRAMES == 65536
    assert data["design"]["numtaps"] == res.plan.numtaps
    assert data["design"]["method"] == res.plan.method
    assert data["design"]["measured"] == jsonable(res.plan.measured.to_dict())
    assert "design_ms" not in data["design"]
    assert data["source"]["name"] == "interview.wav"
    assert data["source"]["frames"] == int(RATE_IN * 1.5) and data["source"]["channels"] == 2
    assert data["output"]["name"] == "interview_48k.wav"
    assert data["output"]["frames"] == sf.info(converted["out"]).frames
    assert data["gain_db"] == res.gain_db and data["passes"] == 2
    assert str(converted["folder"]) not in text      # no folder of this machine


def test_loaded_recipe_gives_the_spec_delivery_and_block_size(converted):
    r = load_recipe(converted["recipe"])
    res = converted["result"]
    assert r.spec == res.spec and r.delivery == res.delivery
    assert (r.fs_in, r.fs_out, r.block_frames, r.version) == (44100, 48000, 65536, 2)
    assert r.to_dict() == json.load(open(converted["recipe"]))


def _as_version_1(data):
    """The recipe as version 1 wrote it: five delivery fields, no filter_applied, no
    write_passes."""
    old = copy.deepcopy(data)
    old["version"] = 1
    old["delivery"] = {k: v for k, v in old["delivery"].items()
                       if k in recipe_module.RECIPE_V1_DELIVERY}
    del old["filter_applied"], old["write_passes"]
    return old


def test_a_version_1_recipe_is_upgraded_and_re_runs_bit_for_bit(converted, tmp_path, capsys):
    old = _as_version_1(json.load(open(converted["recipe"])))
    path = tmp_path / "v1.recipe.json"
    path.write_text(json.dumps(old))
    r = load_recipe(path)
    assert r.version == 1 and r.data["version"] == 2 and r.filter_applied is True
    assert r.delivery == Delivery(bits="16", dither_seed=7, ceiling_dbtp=-1.0)
    code, out, err = _run(capsys, "convert", converted["src"], tmp_path / "again.wav",
                          "--recipe", path, "--json")
    assert code == 0, err
    assert json.loads(out)["recipe"]["reproduces"] is True
    assert _sha(tmp_path / "again.wav") == old["output"]["sha256"]


def test_load_recipe_reads_a_path_bytes_a_file_object_and_a_dict(converted):
    raw = open(converted["recipe"], "rb").read()
    with open(converted["recipe"], "rb") as f:
        loaded = [load_recipe(str(converted["recipe"])), load_recipe(raw), load_recipe(f),
                  load_recipe(json.loads(raw)), load_recipe(raw.decode())]
    assert len({(r.spec, r.delivery, r.output_sha256) for r in loaded}) == 1


def test_write_recipe_records_a_block_size_and_time_given(converted, tmp_path):
    import datetime as dt
    when = dt.datetime(2026, 3, 1, 13, 30, 5, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    data = write_recipe(converted["result"], tmp_path / "r.json", block_frames=4096,
                        created=when)
    assert data["created"] == "2026-03-01T12:30:05Z" and data["block_frames"] == 4096
    assert load_recipe(tmp_path / "r.json").block_frames == 4096
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"]   # no temporary left


def test_recorded_names_can_be_given_and_keep_only_the_base_name(converted, tmp_path):
    data = recipe_from_result(converted["result"], source_name="C:\\Users\\x\\Interview 3.wav",
                              output_name="/srv/up/Interview 3_48k.wav")
    assert (data["source"]["name"], data["output"]["name"]) == ("Interview 3.wav",
                                                                "Interview 3_48k.wav")
    doc = _parse(sheet_html(converted["result"], audit=None, source_name="Interview 3.wav"))
    assert "Design sheet: Interview 3.wav" in "".join(doc.text)
    with pytest.raises(ParameterError, match="source_name must be a file name"):
        recipe_from_result(converted["result"], source_name="/srv/up/")


@pytest.fixture(scope="module")
def schema():
    return json.load(open(recipe_module.SCHEMA_PATH, encoding="utf-8"))


def test_schema_is_valid_draft_2020_12_and_accepts_a_written_recipe(converted, schema):
    import jsonschema
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.Draft202012Validator(schema).validate(json.load(open(converted["recipe"])))


def test_schema_pins_the_spec_and_delivery_fields(schema):
    from dataclasses import fields
    spec_props = schema["properties"]["spec"]["properties"]
    assert set(spec_props) == {f.name for f in fields(Spec)}
    assert set(schema["properties"]["spec"]["required"]) == set(spec_props)
    dl = schema["properties"]["delivery"]
    # version 2 records every Delivery field (version 1 recorded the first five)
    assert set(dl["properties"]) == set(dl["required"]) == {f.name for f in fields(Delivery)}
    assert set(recipe_module.RECIPE_V1_DELIVERY) <= {f.name for f in fields(Delivery)}
    assert schema["properties"]["version"]["const"] == recipe_module.RECIPE_VERSION == 2


def test_every_schema_property_is_documented(schema):
    missing = []

    def walk(node, where):
        for name, sub in node.get("properties", {}).items():
            if not sub.get("description"):
                missing.append(f"{where}.{name}")
            walk(sub, f"{where}.{name}")

    walk(schema, "recipe")
    assert missing == []
    assert "version" in schema["description"] and "base names" in schema["description"]


def _broken(data, dotted, value, *, delete=False):
    d = copy.deepcopy(data)
    parts = dotted.split(".")
    node = d
    for p in parts[:-1]:
        node = node[p]
    if delete:
        del node[parts[-1]]
    else:
        node[parts[-1]] = value
    return d


BROKEN = [
    ("spec.ripple_db", "0.01", False, "spec.ripple_db"),
    ("spec.ripple_db", 7.0, False, "spec.ripple_db"),
    ("spec.phase", "mixed", False, "spec.phase"),
    ("spec.method", None, True, "spec.method"),
    ("spec.allow_transition_aliasing", 0, False, "spec.allow_transition_aliasing"),
    ("source.sha256", "ABC", False, "source.sha256"),
    ("source.name", "/home/someone/a.wav", False, "source.name"),
    ("route.fs_out", 500, False, "route.fs_out"),
    ("delivery.dither", "loud", False, "delivery.dither"),
    ("delivery.dither_seed", -1, False, "delivery.dither_seed"),
    ("delivery.bits", "8", False, "delivery.bits"),
    ("block_frames", 0, False, "block_frames"),
    ("block_frames", True, False, "block_frames"),
    ("created", "yesterday", False, "created"),
    ("gain_db", None, True, "gain_db"),
    ("extra_field", 1, False, "extra_field"),
    ("design.numtaps", 1.5, False, "design.numtaps"),
]


@pytest.mark.parametrize("dotted, value, delete, field", BROKEN)
def test_broken_recipes_are_refused_naming_the_field_like_the_reference_validator(
        converted, schema, dotted, value, delete, field):
    data = _broken(json.load(open(converted["recipe"])), dotted, value, delete=delete)
    with pytest.raises(ParameterError, match="recipe field " + field.replace(".", r"\.")) as exc:
        load_recipe(data)
    assert exc.value.field == field
    import jsonschema
    assert list(jsonschema.Draft202012Validator(schema).iter_errors(data)) != []


@pytest.mark.parametrize("change, rule", [
    ({"version": 3}, "recipe version 3 is newer than this Rateferry"),
    ({"version": 0}, "recipe version 0 is not a released recipe format"),
    ({"version": "1"}, "recipe version must be a whole number, got \"1\""),
    ({"version": None}, "recipe version must be a whole number, got null"),
    ({"schema": "something-else"}, "not a Rateferry recipe: schema must be"),
])
def test_unknown_versions_are_refused_naming_the_version(converted, change, rule):
    data = dict(json.load(open(converted["recipe"])), **change)
    with pytest.raises(ParameterError, match=rule):
        load_recipe(data)


def test_a_draft_without_version_or_schema_is_refused_clearly(converted):
    data = json.load(open(converted["recipe"]))
    del data["version"]
    with pytest.raises(ParameterError, match="no version: it is a draft from before recipe "
                                             "version 1") as exc:
        load_recipe(data)
    assert exc.value.field == "version"
    with pytest.raises(ParameterError, match='no "schema": "rateferry-recipe" field'):
        load_recipe({"spec": {}})
    with pytest.raises(ParameterError, match="must be a JSON object, got array"):
        load_recipe(b"[1, 2]")


def test_recipe_parts_that_disagree_are_refused(converted):
    data = json.load(open(converted["recipe"]))
    with pytest.raises(ParameterError, match="up/down must be 160/147"):
        load_recipe(_broken(data, "route.up", 320))
    with pytest.raises(ParameterError, match="source.rate_hz must equal 44100"):
        load_recipe(_broken(data, "source.rate_hz", 48000))
    with pytest.raises(ParameterError, match="recipe spec: float32 arithmetic") as exc:
        load_recipe(_broken(_broken(data, "spec.attenuation_db", 140.0), "spec.arithmetic",
                            "float32"))   # a rule of Spec itself, not of the schema
    assert exc.value.field == "spec.arithmetic"


def test_unreadable_recipes_get_a_clear_error(tmp_path):
    (tmp_path / "bad.json").write_text('{"schema": "rateferry-recipe",\n "version": }')
    with pytest.raises(ParameterError, match=r"bad.json is not valid JSON at line 2, column 13"):
        load_recipe(tmp_path / "bad.json")
    with pytest.raises(ParameterError, match="no such file"):
        load_recipe(tmp_path / "missing.json")
    with pytest.raises(ParameterError, match="NaN is not a JSON number"):
        load_recipe(b'{"schema": "rateferry-recipe", "version": NaN}')
    (tmp_path / "big.json").write_bytes(b" " * (recipe_module.RECIPE_MAX_BYTES + 1))
    with pytest.raises(ParameterError, match="larger than"):
        load_recipe(tmp_path / "big.json")


# --------------------------------------------------------------------------------------------
# the sheet

def test_sheet_from_the_command_is_written_and_holds_the_title(converted):
    text = open(converted["sheet"], encoding="utf-8").read()
    doc = _parse(text)
    assert doc.errors == [] and doc.stack == []
    assert "<title>Episode 12</title>" in text
    assert [p.name for p in converted["folder"].iterdir() if ".partial" in p.name] == []


def test_sheet_parses_as_html_with_balanced_tags(page):
    text, doc = page
    assert text.startswith("<!DOCTYPE html>")
    assert doc.errors == [] and doc.stack == []
    for section in ("source", "route", "design", "spectra", "delivery", "audit", "blind",
                    "recipe"):
        assert any(t == "section" and a.get("id") == section for t, a in doc.attrs), section


def test_sheet_makes_no_external_requests(page):
    """No external requests: plotly.min.js carries URL strings of its own (map tile servers,
    its website, licence notes), used only by trace types this sheet never draws. The rule
    checked is therefore: the inlined library is byte for byte the installed plotly.min.js; no
    other part of the page holds "http://" or "https://" at all; no element has a src/href/
    action/etc. attribute pointing anywhere but inside the page; and a Content-Security-Policy
    of default-src 'none' makes the browser refuse any request (the browser test then watches
    the real requests)."""
    import plotly
    text, doc = page
    lib = open(os.path.join(os.path.dirname(plotly.__file__), "package_data", "plotly.min.js"),
               encoding="utf-8").read()
    assert doc.scripts["rf-plotly"] == lib
    rest = text.replace(lib, "")
    assert "http://" not in rest and "https://" not in rest and "//cdn" not in rest
    url_attrs = {"src", "href", "action", "formaction", "data", "poster", "srcset", "background"}
    used = [(t, k, v) for t, a in doc.attrs for k, v in a.items() if k in url_attrs]
    assert used == []
    assert not any(t in ("link", "iframe", "img", "object", "embed", "base") for t in doc.tags)
    csp = [a["content"] for t, a in doc.attrs
           if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert len(csp) == 1 and "default-src 'none'" in csp[0] and "connect-src 'none'" in csp[0]
    own = [s for k, s in doc.scripts.items() if k != "rf-plotly" and not k.startswith("rf-")]
    assert own and not any(w in s for s in own for w in ("fetch(", "XMLHttpRequest",
                                                          "WebSocket", "import("))


def test_sheet_holds_the_recipe_that_reproduces_the_output(converted, page, tmp_path, capsys):
    _, doc = page
    embedded = json.loads(doc.scripts["rf-recipe"])
    r = load_recipe(embedded)
    assert r.output_sha256 == converted["result"].output_sha256
    (tmp_path / "from_sheet.json").write_text(json.dumps(embedded))
    code, _, err = _run(capsys, "convert", converted["src"], tmp_path / "again.wav", "--recipe",
                        tmp_path / "from_sheet.json", "--quiet")
    assert code == 0, err
    assert _sha(tmp_path / "again.wav") == converted["result"].output_sha256
    shown = "".join(doc.text)
    assert json.dumps(embedded, indent=2, ensure_ascii=False) in shown   # displayed too


def test_sheet_figures_equal_the_ones_the_pipeline_reported(converted, page):
    _, doc = page
    res = converted["result"]
    figures = json.loads(doc.scripts["rf-figures"])
    assert figures == jsonable(res.figures())
    cells = [(a["data-key"], json.loads(a["data-value"])) for t, a in doc.attrs
             if t == "td" and "data-key" in a and not a["data-key"].startswith(("blind.",
                                                                                 "audit."))]
    assert len(cells) >= 30
    for key, value in cells:
        assert value == _at(figures, key), key
    # what is shown is the value, rounded for reading (4 significant digits at least)
    numeric = [(k, v) for k, v in cells if isinstance(v, (int, float)) and not
               isinstance(v, bool)]
    assert len(numeric) >= 20
    for key, value in numeric:
        shown = float(doc.cells[key].split()[0])
        assert shown == pytest.approx(value, rel=5e-4, abs=1e-12), key
    keys = {k for k, _ in cells}
    for key in ("numtaps", "measured.passband_ripple_db", "measured.stopband_attenuation_db",
                "output.true_peak_dbtp", "output.integrated_lufs", "source.true_peak_dbtp",
                "clipped_samples", "gain_db", "delivery.dither_seed", "source_sha256",
                "output_sha256", "bits", "prering_ms", "latency_ms"):
        assert key in keys, key


def test_sheet_shows_source_and_delivery_facts(converted, page):
    text, doc = page
    res = converted["result"]
    shown = "".join(doc.text)
    for fact in ("interview.wav", "api_48k.wav", "WAV PCM_24", "WAV PCM_16", "44100 Hz",
                 "48000 Hz", "1.500 s (0:01.500)", "16-bit integer", "tpdf",
                 res.source_sha256, res.output_sha256, f"Rateferry {__version__}",
                 "The filter meets its mask", "160/147"):
        assert fact in shown, fact


def test_sheet_is_under_the_size_budget(page, converted):
    text, _ = page
    size = len(text.encode("utf-8"))
    assert size < sheet.SHEET_BUDGET_BYTES == 6_000_000
    assert os.path.getsize(converted["sheet"]) < sheet.SHEET_BUDGET_BYTES


def test_user_text_cannot_inject_html(converted, tmp_path):
    evil = '<script>alert(1)</script><img src=x onerror="alert(2)">'
    path = write_sheet(converted["result"], tmp_path / "s.html", title=evil + "t",
                       author=evil + "a", note=evil + "n", audit=None,
                       blind={"trials": 4, "correct": 2, "listener": evil})
    text = open(path, encoding="utf-8").read()
    doc = _parse(text)
    assert doc.errors == []
    assert "img" not in doc.tags
    assert text.count("<script>alert") == 0
    shown = "".join(doc.text)
    for suffix in "tan":
        assert evil + suffix in shown     # shown as text, exactly as typed
    assert sum(1 for t in doc.tags if t == "script") == 7   # 5 data + plotly + ours


def test_hostile_file_names_are_escaped_in_markup_and_json(tmp_path):
    name = 'a<b>&"c\'<script>.wav'
    src = _source(tmp_path / name, seconds=0.5)
    res = jobs.convert_file(src, tmp_path / "<b>x.flac", fs_out=48000)
    text = sheet_html(res, audit=None)
    doc = _parse(text)
    assert doc.errors == [] and "b" not in doc.tags
    assert load_recipe(json.loads(doc.scripts["rf-recipe"])).source_name == name
    assert f"Design sheet: {name}" in "".join(doc.text)
    assert "<b>" not in text and "&lt;b&gt;" in text


def test_write_sheet_is_atomic(converted, tmp_path):
    target = tmp_path / "s.html"
    target.write_text("old sheet")
    write_sheet(converted["result"], target, audit=None)
    assert open(target, encoding="utf-8").read().startswith("<!DOCTYPE html>")
    target.write_text("old sheet")
    with pytest.raises(ParameterError, match="note must be text, got int") as exc:
        write_sheet(converted["result"], target, note=5, audit=None)
    assert exc.value.field == "note"
    with pytest.raises(ParameterError, match="title must be at most 200 characters"):
        write_sheet(converted["result"], target, title="x" * 201, audit=None)
    with pytest.raises(ParameterError, match="the folder .* does not exist"):
        write_sheet(converted["result"], tmp_path / "nowhere" / "s.html", audit=None)
    assert target.read_text() == "old sheet"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.html"]


def test_blind_results_are_shown_with_the_binomial_p_value(page, converted):
    text, doc = page
    cells = {a["data-key"]: json.loads(a["data-value"]) for t, a in doc.attrs
             if t == "td" and a.get("data-key", "").startswith("blind.")}
    assert cells["blind.trials"] == 16 and cells["blind.correct"] == 12
    # reference: scipy's exact one-sided binomial test, 12 of 16 at p = 1/2 -> 0.0384
    ref = stats.binomtest(12, 16, 0.5, alternative="greater").pvalue
    assert cells["blind.p_value"] == pytest.approx(ref, rel=1e-12)
    assert json.loads(doc.scripts["rf-blind"])["p_value"] == pytest.approx(0.0384063720703125)
    plain = sheet_html(converted["result"], audit=None)
    assert 'id="blind"' not in plain and json.loads(_parse(plain).scripts["rf-blind"]) is None
    given = _parse(sheet_html(converted["result"], audit=None,
                              blind={"trials": 10, "correct": 9, "p_value": 0.5}))
    assert json.loads(given.scripts["rf-blind"])["p_value"] == 0.5    # as given, not redone
    with pytest.raises(ParameterError, match="blind must be a dict"):
        sheet_html(converted["result"], audit=None, blind=[1, 2])


def test_plotted_response_is_the_filter_as_scipy_computes_it(converted, page):
    _, doc = page
    plots = json.loads(doc.scripts["rf-plots"])
    design = converted["result"].plan.design
    taps = design.taps / design.phases
    curve = plots["response"]["traces"][0]
    f = np.array(curve["x"])
    v = np.array(curve["y"])
    pick = np.linspace(0, f.size - 1, 25).astype(int)
    pick = pick[v[pick] > -design.mask.attenuation_db - 50]   # above the plot's floor
    _, H = signal.freqz(taps, worN=f[pick], fs=design.filter_rate_hz)
    np.testing.assert_allclose(v[pick], 20 * np.log10(np.abs(H)), atol=2e-3)
    stop = v[f >= design.mask.stopband_hz]
    # the plot keeps the peak of each band, so its worst point is the measured worst case
    assert -stop.max() == pytest.approx(design.measured.stopband_attenuation_db, abs=1e-3)
    assert design.mask.passband_hz in f and design.mask.stopband_hz in f   # exact edges
    close = plots["passband"]["traces"][0]
    fp = np.array(close["x"])
    inband = np.abs(np.array(close["y"])[fp <= design.mask.passband_hz])
    assert inband.max() <= design.mask.ripple_db
    assert inband.max() == pytest.approx(design.measured.passband_ripple_db, rel=0.05, abs=1e-6)
    mask_lines = {t["name"]: t["y"] for t in plots["passband"]["traces"][1:]}
    assert mask_lines == {"mask: +ripple": [0.01, 0.01], "mask: -ripple": [-0.01, -0.01]}


def test_impulse_plot_marks_the_pre_ringing(converted, page):
    _, doc = page
    plot = json.loads(doc.scripts["rf-plots"])["impulse"]
    design = converted["result"].plan.design
    rect = [s for s in plot["layout"]["shapes"] if s["type"] == "rect"]
    assert len(rect) == 1 and rect[0]["x0"] == -design.prering_ms and rect[0]["x1"] == 0
    t = np.array(plot["traces"][0]["x"])
    y = np.array(plot["traces"][0]["y"])
    assert t[np.argmax(y)] == pytest.approx(0.0, abs=1e-9)      # the peak sits at time 0
    assert y.max() == pytest.approx(design.taps.max() / design.phases, rel=1e-6)
    assert t.min() < -design.prering_ms                       # the plot shows all of it


def test_spectra_show_the_tones_and_both_nyquist_limits(page):
    _, doc = page
    plot = json.loads(doc.scripts["rf-plots"])["spectra"]
    assert plot["excerpt"]["nyquist_hz"] == [22050.0, 24000.0]
    lines = sorted(s["x0"] for s in plot["layout"]["shapes"] if s["type"] == "line")
    assert 22050.0 in lines and 24000.0 in lines
    src, out = plot["traces"]
    for trace, nyquist in ((src, 22050.0), (out, 24000.0)):
        f, p = np.array(trace["x"]), np.array(trace["y"])
        assert f.max() <= nyquist
        # both tones stand out from the rest of the spectrum, at their frequencies
        for tone in TONES_HZ:
            near = np.abs(f - tone) < 30
            assert p[near].max() > np.median(p) + 40, (trace["name"], tone)
        assert abs(f[np.argmax(p)] - TONES_HZ[0]) < 10


def test_audit_can_be_skipped_or_given(converted):
    skipped = _parse(sheet_html(converted["result"], audit=None))
    assert json.loads(skipped.scripts["rf-audit"]) is None
    assert "Audit: not run for this sheet." in "".join(skipped.text)
    given = {"passband_deviation_db": 0.004, "worst_alias_db": -121.5,
             "verdict": [{"figure": "worst alias", "measured": -121.5, "limit": -120.0,
                          "passes": True}],
             "curves": {"alias": {"frequency_hz": [100.0, 200.0, 300.0],
                                  "level_db": [-130.0, -125.0, -121.5]}}}
    doc = _parse(sheet_html(converted["result"], audit=given))
    assert json.loads(doc.scripts["rf-audit"]) == {k: v for k, v in given.items()
                                                   if k != "curves"}
    cells = {a["data-key"]: json.loads(a["data-value"]) for t, a in doc.attrs
             if t == "td" and a.get("data-key", "").startswith("audit.")}
    assert cells == {"audit.verdict.0.measured": -121.5, "audit.passband_deviation_db": 0.004,
                     "audit.worst_alias_db": -121.5}
    plots = json.loads(doc.scripts["rf-plots"])
    assert plots["audit-alias"]["traces"][0]["x"] == [100.0, 200.0, 300.0]
    assert plots["audit-alias"]["traces"][0]["y"] == [-130.0, -125.0, -121.5]
    assert plots["audit-alias"]["traces"][-1]["y"] == [-120.0, -120.0]   # the mask's stopband
    with pytest.raises(ParameterError, match="audit must be"):
        sheet_html(converted["result"], audit=42)


def test_sheet_runs_the_real_audit_when_available(converted):
    import webapp.dsp.audit as audit_mod
    design = converted["result"].plan.design
    text = sheet_html(converted["result"])           # audit="auto"
    doc = _parse(text)
    assert doc.errors == []
    embedded = json.loads(doc.scripts["rf-audit"])
    reference = jsonable(audit_mod.audit(design).figures())
    # the audit is deterministic: the sheet carries the figures the audit reports (its raw
    # curves travel only as the reduced plots)
    skip = {"audit_ms", "curves"}
    assert "curves" not in embedded
    assert {k: v for k, v in embedded.items() if k not in skip} == \
        {k: v for k, v in reference.items() if k not in skip}
    cells = {a["data-key"]: json.loads(a["data-value"]) for t, a in doc.attrs
             if t == "td" and a.get("data-key", "").startswith("audit.")}
    for i, row in enumerate(reference["verdict"]):
        assert cells[f"audit.verdict.{i}.measured"] == row["measured"]
    for key in ("passband_deviation_db", "worst_alias_db", "thd_n_db", "noise_floor_dbfs",
                "group_delay_ms"):
        assert cells[f"audit.{key}"] == reference[key]
    plots = json.loads(doc.scripts["rf-plots"])
    dev = plots["audit-deviation"]["traces"]
    assert dev[0]["x"] == pytest.approx(reference["curves"]["deviation"]["freq_hz"], rel=1e-6)
    assert {"audit-deviation", "audit-alias", "audit-impulse"} <= set(plots)
    # the long measured impulse is reduced to points of the curve itself, peak included
    ref_t = np.array(reference["curves"]["impulse"]["time_ms"])
    ref_v = np.array([np.nan if v is None else v
                      for v in reference["curves"]["impulse"]["level_db"]])
    shown = plots["audit-impulse"]["traces"][0]
    assert len(shown["x"]) <= sheet._CURVE_POINTS < ref_t.size
    pos = np.searchsorted(ref_t, np.array(shown["x"]) - 1e-6 * np.maximum(1, abs(ref_t).max()))
    np.testing.assert_allclose(np.array(shown["y"], dtype=float), ref_v[pos], rtol=1e-5)
    assert max(shown["y"]) == pytest.approx(np.nanmax(ref_v), abs=1e-5)
    assert len(text.encode()) < sheet.SHEET_BUDGET_BYTES


def test_the_sheet_and_the_page_plot_the_same_passband_data(converted, page):
    """One figure builder (webapp.figures.passband_curve) behind both: the page's JSON
    (webapp.figures.design_view, served by POST /api/designs) and the sheet's plot agree point
    for point, each within its own rounding (4 decimals on the page, 7 significant digits in
    the sheet)."""
    from webapp.figures import design_view
    _, doc = page
    sheet_trace = json.loads(doc.scripts["rf-plots"])["passband"]["traces"][0]
    page_view = design_view(converted["result"].plan)["passband"]
    fs, ls = np.asarray(sheet_trace["x"]), np.asarray(sheet_trace["y"], dtype=float)
    fp, lp = np.asarray(page_view["freqs_hz"]), np.asarray(page_view["magnitude_db"])
    assert fs.size == fp.size > 100
    np.testing.assert_allclose(fs, fp, rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(ls, lp, rtol=1e-6, atol=1e-6)
