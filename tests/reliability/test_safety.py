"""Safety (issue 6): the model file is data, user text is escaped in every report,
outputs stay inside the chosen folder, a folder robustgmm did not create is not
overwritten without --force, nothing goes to the network, and numerical trouble is
reported rather than hidden.

Data are simulated (robustgmm.simulate, known process); the hostile strings are our
own inventions (code in string fields, markup, LaTeX commands, path climbing).
"""
from __future__ import annotations

import ast
import json
import pickle
import re
import socket
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from robustgmm import cli, core, paths
from robustgmm.audit import grid
from robustgmm.audit import audit
from robustgmm.errors import EstimationError
from robustgmm.modelfile import read_model
from robustgmm.simulate import simulate_panel

from helpers_audit import make_spec
from helpers_reliability import harness_env, install_harness, robustgmm_command, tree, write_model

PACKAGE = Path(cli.__file__).parent


@pytest.fixture
def no_report(monkeypatch):
    """The report is irrelevant to some checks and costs seconds: leave it out."""
    monkeypatch.setattr(cli, "_report_builder", lambda: None)


def _main(args, capsys):
    code = cli.main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def _toml(value: str) -> str:
    return json.dumps(value)  # a JSON string is a valid TOML basic string


# ---------------------------------------------------------------------------
# the model file is data
# ---------------------------------------------------------------------------
def _code(marker: Path) -> str:
    return f"__import__('os').system('touch {marker}')"


def _model_text(**fields) -> str:
    f = {"file": "panel.csv", "outcome": "y", "regressor": "x", "sample_name": "late years",
         "exclude_values": "[3]", "focus": '["y[t-1]"]', "extra": "[]"}
    f.update(fields)
    return f"""
[data]
file = {_toml(f["file"])}
unit = "unit"
period = "period"

[model]
outcome = {_toml(f["outcome"])}

[[model.regressors]]
name = {_toml(f["regressor"])}
lags = [0]
role = "endogenous"

[instruments]
form = "collapsed"
extra = {f["extra"]}

[audit]
focus = {f["focus"]}

[audit.vary]
steps = [1, 2]

[[audit.vary.sample]]
name = {_toml(f["sample_name"])}
period_from = 2003
exclude = {{column = "unit", values = {f["exclude_values"]}}}
"""


@pytest.fixture
def project(tmp_path):
    folder = tmp_path / "project"
    folder.mkdir()
    simulate_panel(50, 7, seed=5).to_csv(folder / "panel.csv", index=False)
    return folder


@pytest.mark.parametrize("field", ["file", "outcome", "regressor", "focus", "extra"])
def test_code_in_a_name_field_is_a_plain_name(project, tmp_path, capsys, field):
    """Code where a file or column name belongs is looked up as a name, not found,
    and reported (exit 2); it never runs."""
    marker = tmp_path / "PWNED"
    code_text = _code(marker)
    value = _toml(code_text)
    fields = {"focus": f"[{value}]", "extra": f"[{value}]"}.get(field) or code_text
    model = project / "model.toml"
    model.write_text(_model_text(**{field: fields}))
    for command in (["fit", model], ["audit", model, "--out", tmp_path / "out", "--jobs", "1"]):
        code, _, err = _main(command, capsys)
        assert code == cli.EXIT_INPUT, err
        assert "__import__" in err and "Traceback" not in err  # the culprit, quoted
        assert not marker.exists()


def test_code_in_free_text_is_kept_as_text(project, tmp_path, capsys, no_report):
    """A sample name and excluded values are plain text: the audit runs and shows
    them verbatim; nothing is evaluated."""
    marker = tmp_path / "PWNED"
    name = "late years " + _code(marker)
    model = project / "model.toml"
    model.write_text(_model_text(sample_name=name, exclude_values=f"[{_toml(_code(marker))}]"))
    spec = read_model(model)
    assert spec.vary.samples[0].name == name
    assert spec.vary.samples[0].exclude_values == (_code(marker),)
    code, _, err = _main(["audit", model, "--out", tmp_path / "out", "--jobs", "1"], capsys)
    assert not marker.exists()
    assert code == 0, err  # a text value matches no unit of the numeric column
    variants = pd.read_csv(tmp_path / "out" / "variants.csv")
    assert name in set(variants["sample"])


def test_a_pickle_is_never_loaded(project, tmp_path, capsys):
    """A data file that would run code if unpickled is refused by its type."""
    marker = tmp_path / "PWNED"

    class Payload:
        def __reduce__(self):
            import os
            return (os.system, (f"touch {marker}",))
    for suffix in (".pkl", ".pickle", ".npy", ".py"):
        data = project / f"panel{suffix}"
        data.write_bytes(pickle.dumps(Payload()))
        model = project / "model.toml"
        model.write_text(_model_text(file=data.name))
        code, _, err = _main(["fit", model], capsys)
        assert code == cli.EXIT_INPUT and "unsupported file type" in err, err
    assert not marker.exists()


# names of calls and modules that would evaluate text or load code
_EVALUATING_NAMES = {"eval", "exec", "compile", "__import__"}  # builtins called by name
_EVALUATING_ATTRIBUTES = {"eval", "exec", "read_pickle", "literal_eval", "system", "popen",
                          "query", "import_module", "load_module"}  # e.g. frame.query(...)
_EVALUATING_MODULES = {"pickle", "marshal", "shelve", "dill", "cloudpickle", "importlib",
                       "runpy", "code", "codeop"}


def test_no_evaluation_anywhere_in_the_package():
    """A scan of the package's source: no call that evaluates text or loads code, no
    shell, and processes only in the benchmark (its own fixed workloads)."""
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        tree_ = ast.parse(path.read_text(), filename=str(path))
        for node in ast.walk(tree_):
            if isinstance(node, ast.Call):
                f = node.func
                if ((isinstance(f, ast.Name) and f.id in _EVALUATING_NAMES)
                        or (isinstance(f, ast.Attribute) and f.attr in _EVALUATING_ATTRIBUTES)):
                    name = f.id if isinstance(f, ast.Name) else f.attr
                    found.append(f"{path.name}:{node.lineno} {name}()")
                for kw in node.keywords:
                    if kw.arg == "shell":
                        found.append(f"{path.name}:{node.lineno} shell=")
            elif isinstance(node, (ast.Import, ast.ImportFrom)):
                mods = ([a.name for a in node.names] if isinstance(node, ast.Import)
                        else [node.module or ""])
                for mod in mods:
                    top = mod.split(".")[0]
                    if top in _EVALUATING_MODULES:
                        found.append(f"{path.name}:{node.lineno} import {mod}")
                    if top == "subprocess" and path.name != "bench.py":
                        found.append(f"{path.name}:{node.lineno} import subprocess")
    assert found == []


# ---------------------------------------------------------------------------
# user text in reports; outputs stay inside the folder
# ---------------------------------------------------------------------------
XSS = "x<script>alert(1)</script>"
CLIMB = "../../w_evil"
TEX = "y&\\input{/etc/passwd}%$#_{}~^"
SAMPLE = "../../escape <b>bold</b>"


def _hostile_project(folder: Path) -> Path:
    folder.mkdir(parents=True)
    frame = simulate_panel(60, 7, seed=3).rename(columns={"x": XSS, "w": CLIMB, "y": TEX})
    frame.to_csv(folder / "panel.csv", index=False)
    model = folder / "model.toml"
    model.write_text(f"""
[data]
file = "panel.csv"
unit = "unit"
period = "period"

[model]
outcome = {_toml(TEX)}

[[model.regressors]]
name = {_toml(XSS)}
lags = [0]
role = "endogenous"

[[model.regressors]]
name = {_toml(CLIMB)}
lags = [0]
role = "exogenous"

[instruments]
form = "collapsed"

[audit.vary]
steps = [1, 2]

[[audit.vary.sample]]
name = {_toml(SAMPLE)}
period_from = 2003
""")
    return model


@pytest.fixture(scope="module")
def hostile_audit(tmp_path_factory):
    """Audit and report of a model whose names carry markup, LaTeX and path climbing."""
    root = tmp_path_factory.mktemp("hostile")
    model = _hostile_project(root / "deep" / "er" / "project")
    before = tree(root)
    out = root / "deep" / "er" / "out"
    assert cli.main(["audit", str(model), "--out", str(out), "--jobs", "1"]) == 0
    return root, out, before


def test_names_with_markup_are_accepted_and_shown_verbatim(hostile_audit):
    root, out, _ = hostile_audit
    estimates = pd.read_csv(out / "estimates.csv")
    assert {f"{TEX}[t-1]", f"{XSS}[t]", f"{CLIMB}[t]"} <= set(estimates["term"])
    verdict = json.loads((out / "verdict.json").read_text())
    assert f"{XSS}[t]" in verdict["terms"]
    assert SAMPLE in set(pd.read_csv(out / "variants.csv")["sample"])


def test_html_report_escapes_user_text(hostile_audit):
    _, out, _ = hostile_audit
    html = (out / "report.html").read_text()
    assert "<script>alert" not in html and "<b>bold" not in html
    assert "x&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;b&gt;bold&lt;/b&gt;" in html
    # the report's own scripts (table sorting) carry no user text
    scripts = re.findall(r"<script\b.*?</script>", html, re.IGNORECASE | re.DOTALL)
    assert len(scripts) == len(re.findall(r"<script\b", html, re.IGNORECASE))
    assert not any("alert" in s or "passwd" in s or "w_evil" in s for s in scripts)


def _without_code_spans(markdown: str) -> str:
    # text inside `...` is shown literally by every Markdown renderer (CommonMark 6.1)
    return re.sub(r"`[^`\n]*`", "", markdown)


def test_markdown_report_escapes_user_text(hostile_audit):
    _, out, _ = hostile_audit
    md = _without_code_spans((out / "report.md").read_text())
    assert XSS.split("alert")[0] not in md  # no raw "<script>" outside code spans
    assert "<b>" not in md and "x&lt;script" in md


def test_latex_table_escapes_user_text(hostile_audit):
    _, out, _ = hostile_audit
    # zero-width break points inside long identifiers are not part of the text
    tex = (out / "table.tex").read_text().replace("\\allowbreak{}", "")
    assert "\\input{" not in tex.replace("\\textbackslash{}input", "")
    assert TEX not in tex and XSS not in tex
    body = [line for line in tex.splitlines() if "passwd" in line]
    assert body, "the outcome's lag is a row of the table"
    for line in body:  # every special character of the name is escaped (& separates cells)
        assert not re.search(r"(?<!\\)[%$#_^]", line), line


def test_svg_figures_carry_no_markup(hostile_audit):
    _, out, _ = hostile_audit
    svgs = list((out / "figures").glob("*.svg"))
    assert svgs
    for svg in svgs:
        text = svg.read_text()
        assert "<script" not in text and "<b>" not in text, svg.name


def test_outputs_stay_inside_the_folder(hostile_audit):
    root, out, before = hostile_audit
    after = tree(root)
    outside = {p for p in set(after) - set(before) if not Path(p).is_relative_to(out)}
    assert outside == set()
    assert any(Path(p).is_relative_to(out / "figures") for p in after)
    changed = {p for p in before if before[p] != after.get(p)}
    assert changed == set()  # the project's files untouched
    for path in out.rglob("*"):
        assert not path.is_symlink()
        assert path.resolve().is_relative_to(out.resolve())
    # file names derive from ids (hex) and sanitised term labels, never from raw text
    names = [p.name for p in (out / "figures").iterdir()]
    assert all(re.fullmatch(r"[A-Za-z0-9._\-]+", n) for n in names), names
    assert all(re.fullmatch(r"[0-9a-f]{64}\.json", p.name) for p in (out / ".cache").iterdir())
    ids = pd.read_csv(out / "variants.csv")["variant"]
    assert ids.str.fullmatch(r"[0-9a-f]+").all()


def test_a_symlink_planted_in_the_folder_is_replaced_not_followed(tmp_path, capsys, no_report):
    """Atomic writes rename a new file over the path: a symlink there is replaced,
    and the file it pointed to is left alone."""
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    precious = tmp_path / "precious.csv"
    precious.write_text("keep me\n")
    out = tmp_path / "out"
    out.mkdir()
    (out / paths.OUTPUT_MARKER).write_text("{}")
    (out / "variants.csv").symlink_to(precious)
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1", "--no-cache"], capsys)
    assert code == 0, err
    assert precious.read_text() == "keep me\n"
    assert not (out / "variants.csv").is_symlink()


# ---------------------------------------------------------------------------
# the output-folder guard
# ---------------------------------------------------------------------------
def _model_and_foreign_folder(tmp_path, name: str, files: dict):
    """A model file and a folder ``name`` holding someone else's ``files``."""
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / name
    out.mkdir()
    for file, text in files.items():
        (out / file).write_text(text)
    return model, out


def test_foreign_folder_is_left_untouched_without_force(tmp_path, capsys):
    model, out = _model_and_foreign_folder(tmp_path, "thesis", {
        "chapter1.tex": "precious", "report.html": "my own report"})
    before = tree(out)
    for command in (["audit", model, "--out", out], ["demo", "--out", out]):
        code, _, err = _main(command, capsys)
        assert code == cli.EXIT_INPUT and "--force" in err and str(out) in err
        assert len(err.strip().splitlines()) == 1
        assert tree(out) == before  # nothing written, not even the marker


def test_a_foreign_manifest_does_not_make_a_folder_ours(tmp_path, capsys):
    """A web project's manifest.json is not a robustgmm audit."""
    model, out = _model_and_foreign_folder(tmp_path, "webapp", {
        "manifest.json": '{"name": "my app", "start_url": "/"}', "index.html": "<html></html>"})
    before = tree(out)
    code, _, err = _main(["audit", model, "--out", out], capsys)
    assert code == cli.EXIT_INPUT and "--force" in err
    assert tree(out) == before
    (out / "manifest.json").write_text("not json at all")
    code, _, err = _main(["audit", model, "--out", out], capsys)
    assert code == cli.EXIT_INPUT


def test_force_and_own_folders(tmp_path, capsys, no_report):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    out = tmp_path / "mixed"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1", "--force"], capsys)
    assert code == 0, err
    assert (out / "notes.txt").read_text() == "mine"
    assert json.loads((out / "manifest.json").read_text())["package"] == "robustgmm"
    # a folder robustgmm wrote is reused without --force
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err
    # and so is one whose audit was interrupted (marker, no manifest yet)
    (out / "manifest.json").unlink()
    code, _, err = _main(["audit", model, "--out", out, "--jobs", "1"], capsys)
    assert code == 0, err


# ---------------------------------------------------------------------------
# no network
# ---------------------------------------------------------------------------
class _NoNetwork:
    def __init__(self):
        self.attempts = []

    def refuse(self, what):
        def refuse(*args, **kw):
            self.attempts.append((what, args[1:2] if what == "connect" else args[:1]))
            raise PermissionError(f"network access refused by the test: {what}")
        return refuse

    def install(self, monkeypatch):
        monkeypatch.setattr(socket.socket, "connect", self.refuse("connect"))
        monkeypatch.setattr(socket.socket, "connect_ex", self.refuse("connect_ex"))
        monkeypatch.setattr(socket.socket, "sendto", self.refuse("sendto"))
        monkeypatch.setattr(socket, "create_connection", self.refuse("create_connection"))
        monkeypatch.setattr(socket, "getaddrinfo", self.refuse("getaddrinfo"))
        monkeypatch.setattr(socket, "gethostbyname", self.refuse("gethostbyname"))


def test_fit_and_audit_without_network(tmp_path, capsys, monkeypatch, no_report):
    model = write_model(tmp_path / "project", {"steps": [1, 2], "form": ["per-period",
                                                                      "collapsed"]})
    guard = _NoNetwork()
    guard.install(monkeypatch)
    code, _, err = _main(["fit", model, "--json", tmp_path / "fit.json"], capsys)
    assert code == 0, err
    code, _, err = _main(["audit", model, "--out", tmp_path / "out", "--jobs", "1"], capsys)
    assert code == 0, err
    assert guard.attempts == []
    with pytest.raises(PermissionError):  # the guard was live
        socket.getaddrinfo("localhost", 80)


@pytest.mark.slow  # the report with its figures, about 5 s
def test_report_without_network(tmp_path, capsys, monkeypatch):
    model = write_model(tmp_path / "project", {"steps": [1, 2]})
    code, _, err = _main(["audit", model, "--out", tmp_path / "out", "--jobs", "1"], capsys)
    assert code == 0, err
    guard = _NoNetwork()
    guard.install(monkeypatch)
    code, _, err = _main(["report", tmp_path / "out"], capsys)
    assert code == 0, err
    assert guard.attempts == []
    html = (tmp_path / "out" / "report.html").read_text()
    # self-contained: nothing to fetch when it is opened
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", html)


@pytest.mark.slow  # worker processes and a report, about 15 s
def test_parallel_audit_without_network_in_any_process(tmp_path):
    """Every process (the command and its loky workers) runs with an audit hook that
    refuses internet sockets and name look-ups."""
    model = write_model(tmp_path / "project", {"steps": [1, 2], "form": ["per-period",
                                                                      "collapsed"]})
    harness = install_harness(tmp_path / "harness")
    log = tmp_path / "network.log"
    env = harness_env(harness, ROBUSTGMM_TEST_NONET=log, ROBUSTGMM_TEST_COUNT=tmp_path / "n")
    proc = subprocess.run(robustgmm_command("audit", model, "--out", tmp_path / "out",
                                            "--jobs", "2", "--start-workers"),
                          capture_output=True, text=True, env=env, timeout=600)
    assert proc.returncode == 0, proc.stderr
    assert not log.exists(), log.read_text()
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["run"]["backend"] == "loky" and manifest["run"]["jobs"] == 2
    # the hook was live: it refuses a look-up in a process started the same way
    probe = subprocess.run([robustgmm_command()[0], "-c",
                            "import socket; socket.getaddrinfo('localhost', 80)"],
                           capture_output=True, text=True, env=env, timeout=60)
    assert probe.returncode != 0 and "refused by the test" in probe.stderr
    assert log.exists()


# ---------------------------------------------------------------------------
# numerical trouble is reported, not hidden
# ---------------------------------------------------------------------------
@pytest.fixture
def troubled(tmp_path):
    """A panel with a duplicated instrument column (w2 = 2 w), a nearly duplicated one
    (w plus noise of size 1e-9), a regressor that is the sum of two others and a
    linear trend."""
    frame = simulate_panel(60, 7, seed=2)
    rng = np.random.default_rng(0)
    frame["w2"] = 2.0 * frame["w"]
    frame["w_near"] = frame["w"] + 1e-9 * rng.normal(size=len(frame))
    frame["w_plus_x"] = frame["w"] + frame["x"]
    frame["trend"] = frame["period"].astype(float)
    frame.to_csv(tmp_path / "panel.csv", index=False)
    return tmp_path


def _audit_variants(spec) -> pd.DataFrame:
    result = audit(spec, jobs=1)
    return result.variants


@pytest.mark.parametrize("extra", ["w2", "w_near"])
def test_rank_deficient_instruments_reach_variants_csv(troubled, extra, tmp_path):
    spec = make_spec(troubled, {"steps": [1, 2]}, instruments={"extra": [extra]})
    panel = grid.load_panels(spec)[grid.sample_key(spec.sample)]
    result = core.fit(spec, panel)
    assert any("singular" in w and "pseudo-inverse" in w for w in result.warnings)
    from robustgmm.audit import write_audit
    out = write_audit(audit(spec, jobs=1), tmp_path / "out")
    variants = pd.read_csv(out / "variants.csv", keep_default_na=False)
    ok = variants[variants["status"] == "ok"]
    assert len(ok) == 2
    assert ok["warnings"].str.contains("weight matrix is singular").all()
    assert ok["warnings"].str.contains("pseudo-inverse").all()


def test_instruments_outnumbering_units_reach_variants_csv(tmp_path):
    frame = simulate_panel(25, 8, seed=6)  # per-period: 62 instruments; collapsed: 22
    frame.to_csv(tmp_path / "panel.csv", index=False)
    spec = make_spec(tmp_path, {"form": ["per-period", "collapsed"]},
                     instruments={"form": "per-period"}, method={"steps": 2})
    v = _audit_variants(spec).set_index("form")
    assert v.loc["per-period", "instruments"] > v.loc["per-period", "units"]
    assert "outnumber" in v.loc["per-period", "warnings"]
    assert "weight matrix is singular" in v.loc["per-period", "warnings"]
    assert v.loc["collapsed", "instruments"] < v.loc["collapsed", "units"]
    assert v.loc["collapsed", "warnings"] == ""  # no false alarm


def test_collinear_regressor_is_named_not_hidden(troubled, tmp_path, capsys):
    regressors = [{"name": "x", "lags": [0], "role": "endogenous"},
                  {"name": "w", "lags": [0], "role": "exogenous"},
                  {"name": "w_plus_x", "lags": [0], "role": "exogenous"}]
    spec = make_spec(troubled, {"steps": [1, 2]}, model={"regressors": regressors})
    v = _audit_variants(spec)
    assert (v["status"] == "failed").all()
    assert v["reason"].str.contains("w_plus_x[t]", regex=False).all()
    model = write_model(troubled, None, name="collinear.toml", model={"regressors": regressors})
    code, _, err = _main(["fit", model], capsys)
    assert code == cli.EXIT_INPUT and "w_plus_x[t]" in err


def test_fit_shows_the_warnings(troubled, tmp_path, capsys):
    model = write_model(troubled, None, name="dup.toml", instruments={"extra": ["w2"]})
    code, out, err = _main(["fit", model, "--json", tmp_path / "fit.json"], capsys)
    assert code == 0, err
    assert "Warnings" in out and "pseudo-inverse" in out
    assert any("singular" in w for w in json.loads((tmp_path / "fit.json").read_text())["warnings"])


def test_a_regressor_collinear_with_the_time_effects_is_an_error(troubled, tmp_path, capsys):
    # With time effects, a linear trend is a combination of the period dummies after
    # the transform (and z = 2x + 1 a combination of x and the constant in system
    # GMM): dropping a dummy or the constant would make the regressor's coefficient
    # an arbitrary normalisation (issue 12 item 2). The core used to drop one more
    # dummy with a warning; now the terms are named and the variant fails.
    frame = pd.read_csv(troubled / "panel.csv")
    frame["x_affine"] = 2.0 * frame["x"] + 1.0
    frame.to_csv(troubled / "panel.csv", index=False)
    cases = [([{"name": "trend", "lags": [0], "role": "exogenous"},
               {"name": "x", "lags": [0], "role": "endogenous"}], "difference", ["trend[t]"]),
             ([{"name": "trend", "lags": [0], "role": "exogenous"},
               {"name": "x", "lags": [0], "role": "endogenous"}], "system", ["trend[t]"]),
             ([{"name": "x", "lags": [0], "role": "endogenous"},
               {"name": "x_affine", "lags": [0], "role": "exogenous"}], "system",
              ["x[t]", "x_affine[t]"])]
    for regressors, equations, named in cases:
        spec = make_spec(troubled, None, model={"regressors": regressors},
                         method={"equations": equations})
        with pytest.raises(EstimationError) as info:
            core.fit(spec, grid.load_panels(spec)[grid.sample_key(spec.sample)])
        text = str(info.value)
        assert "exact linear function" in text and "constant and period effects" in text
        assert all(term in text for term in named), text
        assert "x[t]" in text or named == ["trend[t]"]
        if named == ["trend[t]"]:
            assert "x[t]" not in text  # x is not part of the dependency
    model = write_model(troubled, None, name="affine.toml",
                        model={"regressors": cases[2][0]}, method={"equations": "system"})
    code, _, err = _main(["fit", model], capsys)
    assert code == cli.EXIT_INPUT and "x_affine[t]" in err and len(err.strip().splitlines()) == 1


def test_collinearity_in_one_sample_fails_that_variant_only(troubled):
    # z = 2x + 1 from 2004 on, independent before: the full sample identifies
    # both coefficients, the late sample does not (issue 12 item 2: that variant
    # fails with the reason, the audit goes on)
    frame = pd.read_csv(troubled / "panel.csv")
    rng = np.random.default_rng(5)
    frame["z"] = np.where(frame["period"] >= 2004, 2.0 * frame["x"] + 1.0, rng.normal(size=len(frame)))
    frame.to_csv(troubled / "panel.csv", index=False)
    regressors = [{"name": "x", "lags": [0], "role": "endogenous"},
                  {"name": "z", "lags": [0], "role": "exogenous"}]
    spec = make_spec(troubled, {"equations": ["system"],
                                "sample": [{"name": "late", "period_from": 2004}]},
                     model={"regressors": regressors}, method={"equations": "system"})
    v = _audit_variants(spec).set_index("sample")
    assert v.loc["full sample", "status"] == "ok"
    assert v.loc["late", "status"] == "failed"
    assert "x[t] and z[t] are exact linear functions" in v.loc["late", "reason"]


def test_reports_show_numerical_warnings(troubled, tmp_path):
    from robustgmm.audit import write_audit
    from robustgmm.report import build_report
    spec = make_spec(troubled, {"steps": [1, 2]}, instruments={"extra": ["w2"]})
    out = write_audit(audit(spec, jobs=1), tmp_path / "out")
    assert pd.read_csv(out / "variants.csv")["warnings"].str.contains("pseudo-inverse").all()
    build_report(out, formats=())  # the text documents only
    for name in ("report.html", "report.md"):
        assert "pseudo-inverse" in (tmp_path / "out" / name).read_text(), name
