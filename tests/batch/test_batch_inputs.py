"""Batch inputs: manifests with per-file overrides, name patterns, clashes, existing outputs,
recipes as templates. Conversions run on the real Dask workers of conftest.py; each output is
compared with `rateferry convert` of the same file with the same options (the reference)."""

import json
import os

import pytest

from webapp.batch import BatchOptions, run_batch
from webapp.batch.prepare import USE_EXACT, USE_TEMPLATE, Settings
from webapp.cli import main as cli_main
from webapp.delivery import Delivery
from webapp.dsp.errors import ParameterError
from webapp.dsp.spec import preset
from webapp.recipe import load_recipe

from .conftest import CORRUPT, convert_line

pytestmark = pytest.mark.timeout(180)


def settings(out, **kw):
    base = dict(out_dir=str(out), fs_out=16000, spec=preset("spoken_word_delivery"),
                delivery=Delivery(bits="16", ceiling_dbtp=-1.0))
    base.update(kw)
    return Settings(**base)


def run(client, inputs, out, **kw):
    opts = kw.pop("options", {})
    return run_batch(BatchOptions(inputs=tuple(map(str, inputs)), settings=settings(out, **kw),
                                  progress_line=False, sheet=False, **opts), client=client)


def first(sources, suffix):
    return sorted(p for p in sources.iterdir() if p.name.endswith(suffix) and p.name != CORRUPT)


def test_csv_manifest_overrides_per_file_and_matches_convert(dask_cluster, sources, tmp_path):
    client = dask_cluster[2]
    a, b = first(sources, ".flac")[:2]
    manifest = tmp_path / "list.csv"
    manifest.write_text("source,output,bits,fs_out,attenuation_db\n"
                        f"{a},a_24.flac,24,,\n"
                        f"{os.path.relpath(b, tmp_path)},,,8000,90\n")
    out = tmp_path / "out"
    outcome = run(client, [manifest], out)
    assert outcome.exit_code == 0, outcome.rows
    ref_a, ref_b = tmp_path / "ref_a.flac", tmp_path / "ref_b.flac"
    assert convert_line(a, ref_a, ["--bits", "24"])[0] == 0
    assert convert_line(b, ref_b, ["--to", "8000", "--attenuation", "90"])[0] == 0
    assert (out / "a_24.flac").read_bytes() == ref_a.read_bytes()
    name_b = f"{b.stem}_8k_16bit.flac"           # default name: stem, rate, word length
    assert (out / name_b).read_bytes() == ref_b.read_bytes()


def test_jsonl_manifest_takes_grouped_overrides(dask_cluster, sources, tmp_path):
    client = dask_cluster[2]
    a = first(sources, ".wav")[0]
    manifest = tmp_path / "list.jsonl"
    manifest.write_text(json.dumps({"source": str(a), "delivery": {"dither": "none"},
                                    "spec": {"phase": "minimum"}}) + "\n")
    outcome = run(client, [manifest], tmp_path / "out")
    assert outcome.exit_code == 0
    ref = tmp_path / "ref.wav"
    assert convert_line(a, ref, ["--dither", "none", "--phase", "minimum"])[0] == 0
    assert (tmp_path / "out" / f"{a.stem}_16k_16bit.wav").read_bytes() == ref.read_bytes()


def test_name_pattern_and_output_format(dask_cluster, sources, tmp_path):
    client = dask_cluster[2]
    a = first(sources, ".wav")[0]
    outcome = run(client, [a], tmp_path, name_pattern="{parent}-{stem}-{hz}.{format}",
                  format=".flac")
    assert outcome.exit_code == 0
    assert outcome.rows[0]["output"] == f"{sources.name}-{a.stem}-16000.flac"
    ref = tmp_path / "ref.flac"
    assert convert_line(a, ref)[0] == 0
    assert (tmp_path / outcome.rows[0]["output"]).read_bytes() == ref.read_bytes()


def test_two_inputs_writing_one_name_are_refused_before_any_work(sources, tmp_path, capsys):
    a = first(sources, ".wav")[0]
    twin = tmp_path / "twin"
    twin.mkdir()
    (twin / a.name).write_bytes(a.read_bytes())
    out = tmp_path / "out"
    code = cli_main(["batch", str(a), str(twin / a.name), "--out", str(out), "--to", "16000",
                     "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("rateferry: error: ") and str(a) in err \
        and str(twin / a.name) in err and f"{a.stem}_16k_16bit.wav" in err
    assert not out.exists() or not [p for p in out.iterdir() if p.suffix == ".wav"]


@pytest.mark.parametrize("argv, rule", [
    (["--names", "{stem}_{speed}.wav"], "the name pattern may use"),
    (["--names", "{rate}.{format}"], "must hold {stem}"),
    (["--attenuation", "500"], "attenuation_db must be a number from"),
])
def test_bad_options_are_one_line_and_exit_2(sources, tmp_path, capsys, argv, rule):
    code = cli_main(["batch", str(sources), "--out", str(tmp_path), "--to", "16000", *argv])
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("rateferry: error: ") and rule in err


def test_bad_manifest_line_names_the_line(tmp_path, capsys):
    manifest = tmp_path / "list.csv"
    manifest.write_text("source,bits\nx.wav,12\n")
    code = cli_main(["batch", str(manifest), "--out", str(tmp_path / "o"), "--to", "16000"])
    err = capsys.readouterr().err
    assert code == 2 and "list.csv line 2" in err and "bits must be one of" in err


def test_an_output_the_batch_did_not_make_is_left_alone(dask_cluster, sources, tmp_path):
    client = dask_cluster[2]
    a = first(sources, ".wav")[0]
    target = tmp_path / f"{a.stem}_16k_16bit.wav"
    target.write_bytes(b"someone else's file")
    outcome = run(client, [a], tmp_path)
    assert outcome.exit_code == 4
    assert "already exists in the output folder" in outcome.rows[0]["message"]
    assert target.read_bytes() == b"someone else's file"
    outcome = run(client, [a], tmp_path, options=dict(replace=True))
    ref = tmp_path / "ref.wav"
    assert convert_line(a, ref)[0] == 0
    assert outcome.exit_code == 0 and target.read_bytes() == ref.read_bytes()


def test_a_recipe_is_an_exact_rerun_for_its_source_and_a_template_for_others(
        dask_cluster, sources, tmp_path):
    client = dask_cluster[2]
    a, b = first(sources, ".wav")[:2]
    recipe_path = tmp_path / "a.recipe.json"
    assert convert_line(a, tmp_path / "a_ref.wav", ["--write-recipe", str(recipe_path)])[0] == 0
    recipe = load_recipe(str(recipe_path))
    out = tmp_path / "out"
    outcome = run(client, [a, b], out, recipe=recipe, fs_out=None)
    assert outcome.exit_code == 0, outcome.rows
    rows = {r["source"]: r for r in outcome.rows}
    assert rows[str(a)]["use"] == USE_EXACT and rows[str(a)]["reproduces_recipe"] is True
    assert rows[str(a)]["output_sha256"] == recipe.output_sha256
    assert rows[str(b)]["use"] == USE_TEMPLATE
    ref_b = tmp_path / "b_ref.wav"
    assert convert_line(b, ref_b)[0] == 0             # the recipe's options are OPTIONS
    assert (out / f"{b.stem}_16k_16bit.wav").read_bytes() == ref_b.read_bytes()
    with pytest.raises(ParameterError, match="batch needs --to HZ"):
        run(client, [a], tmp_path / "none", fs_out=None)
