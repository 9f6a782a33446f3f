"""The job model: one prepare/run path, recipe re-runs that check every recorded figure, and
the house rules of the application floor (no arrow back up, no import circle).

Checks against outside references: output length ceil(frames * up / down) (the definition of
rational conversion; scipy.signal.upfirdn's length for the same taps minus the removed delay);
the recipe schema is JSON Schema draft 2020-12, checked by the general-purpose jsonschema
library; the same bytes are the same sha256 (FIPS 180-4, via hashlib).
"""

import ast
import hashlib
import json
import math
import os

import numpy as np
import pytest
import soundfile as sf

from webapp import jobs
from webapp.cli import main
from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError
from webapp.dsp.spec import Spec, preset
from webapp.dsp.stages import Plan, choose_plan, verified_plan
from webapp.recipe import load_recipe

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture
def source(tmp_path, rng):
    """A 1.5 s stereo 44.1 kHz 24-bit WAV: two tones plus a little noise."""
    rate = 44100
    t = np.arange(int(1.5 * rate)) / rate
    x = np.stack([0.3 * np.sin(2 * np.pi * 440 * t), 0.2 * np.sin(2 * np.pi * 3000 * t)], 1)
    x += 0.001 * rng.standard_normal(x.shape)
    path = tmp_path / "take.wav"
    sf.write(path, x, rate, subtype="PCM_24")
    return path


def _sha(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def test_prepare_decides_everything_and_writes_nothing(source, tmp_path):
    target = tmp_path / "out.flac"
    job = jobs.prepare(source, target, fs_out=48000, spec=preset("quick_preview"),
                       delivery=Delivery(bits="16", ceiling_dbtp=-1.0))
    assert not target.exists()
    # rational conversion: ceil(frames * L / M) output frames, here L/M = 160/147
    assert (job.plan.up, job.plan.down) == (160, 147)
    assert job.frames_out == math.ceil(int(1.5 * 44100) * 160 / 147)
    assert job.passes == 2 and job.frames_total == 2 * int(1.5 * 44100)
    assert (job.output.format, job.output.bits) == ("FLAC", "16")
    assert job.download_name("take") == "take_48k_16bit.flac"
    result = jobs.run(job)
    assert result.frames_out == job.frames_out == sf.info(target).frames


def test_float_outputs_run_without_dither(source, tmp_path):
    job = jobs.prepare(source, tmp_path / "o.wav", fs_out=48000, spec=preset("quick_preview"),
                       delivery=Delivery(bits="32f", dither="tpdf"))
    assert job.delivery.dither == "none"


def test_a_single_stage_design_is_a_one_stage_plan():
    spec = preset("quick_preview")
    single = choose_plan(spec, 48000, 16000)
    assert isinstance(single, Plan) and not single.multistage and len(single.stages) == 1
    assert single.figures() == single.design.figures()
    multi = choose_plan(Spec(stages="auto", attenuation_db=100.0, ripple_db=0.05), 192000, 8000)
    assert isinstance(multi, Plan) and multi.multistage and multi.label != "single"


def test_a_plan_that_misses_the_mask_is_refused_before_any_work(source, tmp_path):
    spec = Spec(method="kaiser", attenuation_db=100.0)
    plan = choose_plan(spec, 44100, 48000)
    broken = Plan.single(plan.design.__class__(**{**plan.design.__dict__, "meets_mask": False}))
    with pytest.raises(ParameterError, match="the mask can't be met"):
        jobs.prepare(source, tmp_path / "o.wav", fs_out=48000, plan=broken)
    assert verified_plan(spec, 44100, 48000).meets_mask
    with pytest.raises(ParameterError, match="the design converts 44100 -> 16000 Hz"):
        jobs.prepare(source, tmp_path / "o.wav", fs_out=48000,
                     plan=verified_plan(spec, 44100, 16000))
    assert not (tmp_path / "o.wav").exists()


@pytest.mark.parametrize("data, field, rule", [
    ({"bits": 16}, None, None),
    ({"bits": "12"}, "bits", "bits must be one of 16, 24, 32f, 64f"),
    ({"loudness": -16}, "loudness", "unknown delivery field 'loudness'"),
    ({"ceiling_dbtp": "-1"}, "ceiling_dbtp", "ceiling_dbtp must be a number or null"),
    ([], "delivery", "delivery must be a JSON object"),
])
def test_delivery_from_dict_names_the_field(data, field, rule):
    if rule is None:
        assert Delivery.from_dict(data).bits == "16"
        return
    with pytest.raises(ParameterError, match=rule) as exc:
        Delivery.from_dict(data)
    assert exc.value.field == field


# ---------------------------------------------------------------------------------------------
# recipe re-runs

@pytest.fixture
def recorded(source, tmp_path, capsys):
    """A conversion with a non-default block size and its recipe, written by the CLI."""
    out, recipe = tmp_path / "take_48k.wav", tmp_path / "take_48k.recipe.json"
    code = main(["convert"] + [str(p) for p in (source, out)] + [
        "--to", "48000", "--preset", "quick_preview", "--bits", "16", "--seed", "5",
        "--block-frames", "3001", "--ceiling", "-3", "--write-recipe", str(recipe), "--quiet"])
    capsys.readouterr()
    assert code == 0
    return dict(source=source, out=out, recipe=recipe)


def test_a_recipe_rerun_reproduces_every_recorded_figure(recorded, tmp_path, capsys):
    again = tmp_path / "again.wav"
    code = main(["convert", str(recorded["source"]), str(again), "--recipe", str(recorded["recipe"]),
                 "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    figs = json.loads(out)
    assert figs["recipe"]["reproduces"] is True and figs["recipe"]["differences"] == []
    assert _sha(again) == _sha(recorded["out"])
    # the recipe's block size was used, not the default
    assert load_recipe(recorded["recipe"]).block_frames == 3001


@pytest.mark.parametrize("field, value", [
    ("design.numtaps", 12345),
    ("design.measured.stopband_attenuation_db", 150.0),
    ("gain_db", -3.0),
    ("output.sha256", "0" * 64),
])
def test_a_recipe_whose_record_was_changed_fails_naming_the_field(recorded, tmp_path, capsys,
                                                                 field, value):
    data = json.load(open(recorded["recipe"]))
    node = data
    *path, last = field.split(".")
    for part in path:
        node = node[part]
    node[last] = value
    edited = tmp_path / "edited.recipe.json"
    edited.write_text(json.dumps(data))
    again = tmp_path / "again.wav"
    code = main(["convert", str(recorded["source"]), str(again), "--recipe", str(edited), "--quiet"])
    _, err = capsys.readouterr()
    assert code == jobs.EXIT_RECIPE_MISMATCH == 3
    assert err.startswith("rateferry: error: the re-run does not reproduce the recipe: ")
    assert f"{field} is " in err and err.count("\n") == 1
    assert again.exists()     # kept for inspection: nothing is lost


def test_rerun_refuses_another_source_before_any_work(recorded, tmp_path, rng):
    other = tmp_path / "other.wav"
    sf.write(other, 0.1 * rng.standard_normal((44100, 2)), 44100, subtype="PCM_24")
    recipe = load_recipe(recorded["recipe"])
    with pytest.raises(ParameterError, match="a different file") as exc:
        jobs.rerun(recipe, other, tmp_path / "x.wav")
    assert exc.value.field == "source" and not (tmp_path / "x.wav").exists()


def test_compare_recipes_ignores_names_and_dates_and_nothing_else():
    a = {"created": "2026-01-01T00:00:00Z", "source": {"name": "a.wav", "sha256": "x"},
         "design": {"measured": {"stopband_attenuation_db": 120.0}}, "gain_db": -1.0}
    b = {"created": "2026-02-01T00:00:00Z", "source": {"name": "b.wav", "sha256": "x"},
         "design": {"measured": {"stopband_attenuation_db": 120.0 * (1 + 1e-12)}},
         "gain_db": -1.0}
    assert jobs.compare_recipes(a, b) == []
    b["gain_db"] = -1.001
    assert jobs.compare_recipes(a, b) == [("gain_db", -1.0, -1.001)]


def test_a_mismatch_under_another_version_names_both_versions():
    a = {"software": {"name": "rateferry", "version": "0.1.0"}, "output": {"sha256": "aa"}}
    b = {"software": {"name": "rateferry", "version": "0.2.0"}, "output": {"sha256": "aa"}}
    assert jobs.compare_recipes(a, b) == []          # another version alone is no difference
    b["output"]["sha256"] = "bb"
    diffs = jobs.compare_recipes(a, b)
    assert diffs == [("output.sha256", "aa", "bb"), ("software.version", "0.1.0", "0.2.0")]
    message = jobs.RecipeMismatch(diffs).message
    assert message.startswith("the re-run does not reproduce the recipe: output.sha256 is 'bb'")
    assert "written by Rateferry 0.1.0 and this is 0.2.0" in message


# ---------------------------------------------------------------------------------------------
# the house rules of the application floor

def _imports(path, package):
    tree = ast.parse(open(path, encoding="utf-8").read())
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
                if node.module is None:
                    names.update(f"{mod}.{a.name}" for a in node.names)
                else:
                    names.add(mod)
            elif node.module and node.module.startswith("webapp"):
                names.add(node.module)
                names.update(f"{node.module}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            names.update(a.name for a in node.names if a.name.startswith("webapp"))
    return names


def _modules():
    out = {}
    for folder, _, files in os.walk(os.path.join(ROOT, "webapp")):
        for f in files:
            if f.endswith(".py"):
                path = os.path.join(folder, f)
                rel = os.path.relpath(path, ROOT)[:-3].replace(os.sep, ".")
                name = rel[:-len(".__init__")] if rel.endswith(".__init__") else rel
                package = name if f == "__init__.py" else name.rsplit(".", 1)[0]
                out[name] = _imports(path, package + ".x")
    return out


def test_no_module_below_the_server_imports_the_server_or_the_command_line():
    for name, imports in _modules().items():
        if name.startswith("webapp.server") or name in ("webapp.cli", "webapp.__main__"):
            continue
        bad = sorted(i for i in imports if i.startswith(("webapp.server", "webapp.cli")))
        assert not bad, f"{name} imports {bad}"


def test_the_core_imports_nothing_above_it():
    for name, imports in _modules().items():
        if name.startswith("webapp.dsp"):
            bad = sorted(i for i in imports if i.startswith("webapp") and
                         not i.startswith("webapp.dsp"))
            assert not bad, f"{name} imports {bad}"


def test_there_is_no_import_circle():
    mods = _modules()
    graph = {m: {i for i in imps if i in mods} | {i.rsplit(".", 1)[0] for i in imps
                                                   if i.rsplit(".", 1)[0] in mods} - {m}
             for m, imps in mods.items()}
    # a package's __init__ re-exporting its own modules is not a circle
    graph = {m: {d for d in deps if not m.startswith(d + ".")} for m, deps in graph.items()}
    seen, stack = {}, []

    def visit(m):
        seen[m] = "open"
        stack.append(m)
        for d in sorted(graph[m]):
            if seen.get(d) == "open":
                raise AssertionError("import circle: " + " -> ".join(stack[stack.index(d):] + [d]))
            if d not in seen:
                visit(d)
        stack.pop()
        seen[m] = "done"

    for m in sorted(graph):
        if m not in seen:
            visit(m)
