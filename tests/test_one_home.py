"""Repeated helpers have one home each, checked over the package's source with Python's ``ast`` (a copy detector's
threshold lets short copies slip under; these checks name the helper and where it lives).

- one atomic writer (``grainwright.inference.common.atomic``): no other module renames files into place, makes
  temporary files or reads the umask, and every direct write elsewhere is listed below with what makes it safe;
- one JSON file writer (``write_json_atomic``): no module writes a ``json.dumps`` text itself;
- one centre crop (``grainwright.inference.images.crops``);
- one close-match suggestion (``grainwright.inference.common.suggest``, the only user of ``difflib``);
- one table of data-folder layouts (``grainwright.inference.images.layouts``);
- the training config's scheme names come from the scheme registry.
"""
from __future__ import annotations

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = ("inference", "models", "trainer", "benchmarks", "console", "configs")
ATOMIC = "inference/common/atomic.py"


def _sources() -> dict[str, ast.Module]:
    return {path.relative_to(ROOT).as_posix(): ast.parse(path.read_text(), filename=str(path))
            for folder in FOLDERS for path in sorted((ROOT / folder).rglob("*.py"))}


SOURCES = _sources()


def _calls(tree: ast.Module):
    """(outermost function name or "<module>", call node) for every call in ``tree``."""
    def visit(node: ast.AST, function: str):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and function == "<module>":
            function = node.name
        if isinstance(node, ast.Call):
            yield function, node
        for child in ast.iter_child_nodes(node):
            yield from visit(child, function)

    yield from visit(tree, "<module>")


def _dotted(node: ast.AST) -> str:
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        return f"{_dotted(node.value)}.{node.attr}"
    return "?"


# Renaming into place, temporary files and the umask: the atomic module's business alone.
RENAMERS = {"os.replace", "os.rename", "os.renames", "shutil.move", "tempfile.mkstemp", "tempfile.mkdtemp",
            "tempfile.NamedTemporaryFile", "os.umask"}
# Calls that write a file by path or handle.
WRITERS = {"write_text", "write_bytes", "save", "imwrite", "TiffWriter"}

# Every direct write or rename outside the atomic module: (file, outermost function) -> (the guard the function
# itself calls, or "caller" for a helper handed a temporary path; why it is safe).
DIRECT_WRITES = {
    ("inference/evaluation/report.py", "write_report"): ("atomic_folder", "fills the report's staging folder"),
    ("inference/evaluation/report.py", "_write_csv"): ("caller", "writes into write_report's staging folder"),
    ("inference/evaluation/report.py", "_save_png"): ("caller", "writes into write_report's staging folder"),
    ("inference/images/imageio.py", "write_image"): ("atomic_path", "writes atomic_path's temporary file"),
    ("inference/images/imageio.py", "_write_png"): ("caller", "handed write_image's temporary file"),
    ("inference/images/imageio.py", "_write_tiff"): ("caller", "handed write_image's temporary file"),
    ("inference/images/large_tiff.py", "write_tiled_tiff"): ("atomic_path", "streams into atomic_path's file"),
    ("inference/images/stacks.py", "_write_npy"): ("caller", "handed write_stack's temporary file"),
    ("inference/images/stacks.py", "_write_tiff_stack"): ("caller", "handed write_stack's temporary file"),
    ("inference/runtime/cluster.py", "setup"): ("mkdtemp", "a worker's private copy of the model, removed at teardown"),
    ("inference/runtime/machine_profile.py", "seconds_per_gmac"): ("TemporaryDirectory", "a scratch model"),
    ("inference/runtime/machine_profile.py", "runtime_overhead"): ("TemporaryDirectory", "a scratch model"),
    ("models/checkpoint.py", "save_checkpoint"): ("atomic_path", "torch.save into atomic_path's temporary file"),
    ("models/quantize.py", "quantize_model"): ("TemporaryDirectory", "scratch models for the quantiser"),
    ("trainer/sizing.py", "check_prediction"): ("TemporaryDirectory", "scratch models timed and deleted"),
    ("benchmarks/training.py", "run_bench"): ("mkdtemp", "the benchmark's scratch work folder, not an output"),
}


def _is_write(call: ast.Call) -> bool:
    func = call.func
    name = func.attr if isinstance(func, ast.Attribute) else func.id if isinstance(func, ast.Name) else ""
    if name in WRITERS:
        return True
    if name == "open":  # open(path, "w") or path.open("w")
        modes = [a for a in call.args if isinstance(a, ast.Constant) and isinstance(a.value, str)]
        modes += [k.value for k in call.keywords if k.arg == "mode" and isinstance(k.value, ast.Constant)]
        return any(set(str(mode.value)) & set("wax+") for mode in modes)
    return False


def test_one_atomic_writer_used_by_every_writer():
    found: dict[tuple[str, str], set[str]] = {}
    for path, tree in SOURCES.items():
        if path == ATOMIC:
            continue
        for function, call in _calls(tree):
            dotted = _dotted(call.func)
            if dotted in RENAMERS or _is_write(call):
                found.setdefault((path, function), set()).add(dotted)
    unlisted = {site: calls for site, calls in found.items() if site not in DIRECT_WRITES}
    assert not unlisted, ("write through grainwright.inference.common.atomic (atomic_path, atomic_folder, "
                          f"write_*_atomic), or list the site with its reason: {unlisted}")
    renames = {site: calls & RENAMERS for site, calls in found.items() if calls & RENAMERS}
    assert set(renames) <= {site for site, (guard, _) in DIRECT_WRITES.items() if guard == "mkdtemp"}, renames
    stale = set(DIRECT_WRITES) - set(found)
    assert not stale, f"listed sites that no longer write directly (remove them from DIRECT_WRITES): {stale}"


def test_listed_direct_writes_call_their_guard():
    for (path, function), (guard, _) in DIRECT_WRITES.items():
        if guard == "caller":
            continue
        called = {_dotted(call.func).rpartition(".")[2] for name, call in _calls(SOURCES[path]) if name == function}
        assert guard in called, f"{path}:{function} is listed as guarded by {guard} but does not call it"


def test_only_the_atomic_module_renames_folders_into_place():
    # run folders and report folders: atomic_folder, a temporary name of the atomic module made by os.mkdir
    callers = {path for path, tree in SOURCES.items() for _, call in _calls(tree)
               if _dotted(call.func).rpartition(".")[2] == "atomic_folder"}
    assert callers >= {"trainer/run.py", "inference/evaluation/report.py"}


def test_one_json_file_writer():
    # json.dump to a handle, or a json.dumps text handed to a writer: write_json_atomic does both in one place
    found = []
    for path, tree in SOURCES.items():
        if path == ATOMIC:
            continue
        for function, call in _calls(tree):
            dotted = _dotted(call.func)
            inner = [_dotted(node.func) for arg in call.args for node in ast.walk(arg) if isinstance(node, ast.Call)]
            if dotted == "json.dump" or ("json.dumps" in inner and (_is_write(call) or "atomic" in dotted)):
                found.append(f"{path}:{function}")
    assert not found, f"write JSON files with write_json_atomic: {found}"


def _function_names() -> dict[str, list[str]]:
    names: dict[str, list[str]] = {}
    for path, tree in SOURCES.items():
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                names.setdefault(node.name, []).append(path)
    return names


# (start - edge) // 2: where a centred window starts; only the crop module computes it.
CENTRING = re.compile(r"\(\s*[A-Za-z_][\w.\[\]]*\s*-\s*[A-Za-z_][\w.]*\s*\)\s*//\s*2")


def test_one_centre_crop():
    crop_functions = {name: paths for name, paths in _function_names().items()
                      if re.search(r"cent(re|ral|er)_?(crop|box|window)", name)}
    assert crop_functions == {"centre_box": ["inference/images/crops.py"],
                              "centre_crop": ["inference/images/crops.py"]}
    centring = {path for path in SOURCES for line in (ROOT / path).read_text().splitlines() if CENTRING.search(line)}
    assert centring == {"inference/images/crops.py"}, centring


def test_one_close_match_suggestion():
    users = sorted(path for path, tree in SOURCES.items() for node in ast.walk(tree)
                   if isinstance(node, (ast.Import, ast.ImportFrom))
                   and any(alias.name == "difflib" for alias in node.names) or
                   isinstance(node, ast.ImportFrom) and node.module == "difflib")
    assert users == ["inference/common/suggest.py"]


def test_one_layout_folder_table():
    tables = sorted(path for path, tree in SOURCES.items() for node in ast.walk(tree)
                    if isinstance(node, (ast.Assign, ast.AnnAssign))
                    and "LAYOUT_FOLDERS" in [_dotted(t) for t in (node.targets if isinstance(node, ast.Assign)
                                                                  else [node.target])])
    assert tables == ["inference/images/layouts.py"]
    from grainwright.inference.images.layouts import LAYOUT_FOLDERS
    from grainwright.inference.noise import analysis
    from grainwright.trainer import data

    assert analysis.LAYOUT_FOLDERS is LAYOUT_FOLDERS and data.LAYOUT_FOLDERS is LAYOUT_FOLDERS
    assert set(LAYOUT_FOLDERS) == set(data.LAYOUT_ROLES) == set(data.LAYOUT_TEXT)


def test_scheme_names_come_from_the_registry():
    from grainwright.trainer.config import SCHEMA, SCHEME_NAMES
    from grainwright.trainer.schemes.registry import SCHEMES

    assert SCHEME_NAMES == ("auto", *SCHEMES)
    assert SCHEMA["scheme"].choices == SCHEME_NAMES
    [assignment] = [node for node in ast.walk(SOURCES["trainer/config.py"]) if isinstance(node, ast.Assign)
                    and [_dotted(target) for target in node.targets] == ["SCHEME_NAMES"]]
    spelt = {node.value for node in ast.walk(assignment.value) if isinstance(node, ast.Constant)}
    assert spelt == {"auto"}, "SCHEME_NAMES spells scheme names: derive them from the registry"
