"""The command line's help texts: the caution line, and every command and option kept across the layout change."""
from __future__ import annotations

import argparse

import pytest

from grainwright.console import HELP_CAUTION
from grainwright.console.cli import build_parser, main
from grainwright.console.commands.bench import BENCH_TARGETS

# The commands and options `grainwright --help` listed before the layout change (issue 14), read from the
# parsers of commit 75db9dd. Commands and options may be added; none of these may disappear.
OPTIONS_AT_LAYOUT_CHANGE = {
    "inspect": "--recursive --bit-depth --replace-nonfinite --json --save-noise --overwrite",
    "train": "--data --scheme --set --minutes --steps --out --resume --ms-per-frame --frame --fit-to",
    "export": "--output -o --calibration --int8 --min-int8-psnr --overwrite --threads",
    "info": "--json",
    "denoise": "--out-dir -o --recursive -r --format --float32 --overwrite --keep-mixed --into-input-folder --tile "
               "--batch --strength --noise-sigma --ensemble --threads --receptive-field --alignment --fixed-pattern "
               "--quiet -q",
    "compare": "--noisy --clean --methods --out -o --rois --quick --noise --threads --sure-probes --overwrite "
               "--ensemble-rows "
               "--size-search --profile --frame --ms-per-frame",
    "demo": "--minutes --out --seed --threads",
    "bench models": "--architectures --size --channels --threads --repeats",
    "bench train": "--minutes-per-scheme --schemes --cases --config --set --half-scale --no-throughput --threads "
                   "--seed --json --work",
    "bench runtime": "--int8 --threads --size --repeat --tiles --rss-megapixels --rss-model --profile-out --profile "
                     "--json",
    "bench baselines": "--images --size --sigma --methods --quick --seed --json",
    "bench sizes": "--check-prediction --sweep --profile --frame --targets-ms --threads --repeat --json --work "
                   "--stages --cpu-seconds --long-cpu-seconds --long-steps --seed",
}


def _sub_parsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    found = {}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            found.update(action.choices)
    return found


def _all_parsers() -> dict[str, argparse.ArgumentParser]:
    parsers = {}
    for name, sub in _sub_parsers(build_parser()).items():
        parsers[name] = sub
        for target, bench_parser in _sub_parsers(sub).items():
            parsers[f"{name} {target}"] = bench_parser
    return parsers


def _help_text(argv: list[str], capsys: pytest.CaptureFixture[str]) -> str:
    with pytest.raises(SystemExit) as stopped:
        main(argv)
    assert stopped.value.code == 0
    return capsys.readouterr().out


@pytest.mark.parametrize("argv", [["--help"], ["denoise", "--help"], ["compare", "--help"]],
                         ids=["top-level", "denoise", "compare"])
def test_help_ends_with_the_caution(argv, capsys):
    text = " ".join(_help_text(argv, capsys).split())  # argparse wraps the epilog to the terminal width
    assert text.endswith(" ".join(HELP_CAUTION.split()))
    assert "medical or safety-critical" in HELP_CAUTION and "\n" not in HELP_CAUTION


def test_caution_is_one_sentence_of_our_usual_wording():
    # The same caution as the README's, the report's and the exported model's, shortened to one line.
    assert HELP_CAUTION.count(". ") == 0 and HELP_CAUTION.endswith(".")
    for phrase in ("viewing and screening", "not a substitute for the original", "qualified review"):
        assert phrase in HELP_CAUTION


def test_every_command_and_option_is_still_listed(capsys):
    top = _help_text(["--help"], capsys)
    parsers = _all_parsers()
    for command, options in OPTIONS_AT_LAYOUT_CHANGE.items():
        assert command in parsers, f"'grainwright {command}' is gone"
        assert command.split()[0] in top
        listed = parsers[command].format_help()
        for option in options.split():
            assert option in parsers[command]._option_string_actions, f"grainwright {command}: {option} is gone"
            assert option in listed, f"grainwright {command} --help does not list {option}"
    assert set(BENCH_TARGETS) >= {"models", "train", "runtime", "baselines", "sizes"}
