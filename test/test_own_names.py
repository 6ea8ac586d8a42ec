"""Names of our own: none of the spellings issue 14 replaced is left in code, docs, help texts or
launch files.

Those spellings, as a set, were another program's interface (its command verbs, options, settings
and console prefixes). Each is written below in two pieces joined at run time, so this file does
not contain what it searches for; it also skips itself. Words that stay legitimate elsewhere
(`rate`, `loop`, `topics`, `output`, `storage`, `duration_s`) are checked where they were an
interface: the replay and recorder settings tables and the launch files.
"""

import re
import subprocess
import sys
from pathlib import Path

import pytest

from riskbound.cli import SUBCOMMANDS

REPO = Path(__file__).resolve().parents[1]
THIS = Path(__file__).resolve()


def joined(*pieces):
    return "".join(pieces)


# (regular expression, what replaced it)
OLD_SPELLINGS = [
    (re.escape(joined("riskbound ", "param")) + r"\b", "riskbound tune"),
    (re.escape(joined('"par', 'am", ')), "the tune command"),
    (re.escape(joined("param_", "client")), "riskbound.ros.tune"),
    (r"\b" + joined("start_off", "set_s") + r"\b", "skip_first_s"),
    (r"\b" + joined("publish_", "clock") + r"\b", "drive_sim_time"),
    (r"\b" + joined("clock", "_hz") + r"\b", "sim_time_hz"),
    (joined("--clock", "-hz"), "--sim-time-hz"),
    (r"\b" + joined("start_del", "ay_s") + r"\b", "pause_before_s"),
    (r"\b" + joined("wait_for_sub", "scribers") + r"\b", "await_listeners"),
    (r"\b" + joined("wait_for_pub", "lishers") + r"\b", "await_senders"),
    (r"\b" + joined("wait_time", "out_s") + r"\b", "await_timeout_s"),
    (joined("standard ", "player"), "our own replay, in our words"),
    (r"\b" + joined("rate", ":=") , "speed:="),
    (r"\b" + joined("output", "_bag") + r"\b", "recorded_bag"),
    (r"\b" + joined("output", ":="), "bag_dir:="),
    (r"\b" + joined("topics", ":="), "only_topics:="),
    (joined("--show", "-args"), "--arguments"),
    (joined("--pri", "nt") + r"\b", "--dry-run"),
    (re.escape(joined("[la", "unch]")), "the 'runner │' line prefix"),
    (joined("--sto", "rage") + r"\b", "--bag-format"),
    (joined("--in", "fo") + r"\b", "riskbound bagcheck"),
    (joined("--out", "put") + r"\b", "--out"),
    (r"riskbound crowd [^\n`]*" + joined(" -", "o ") , "--out"),
    (r"\bclosedloop\b[^\n]*" + joined("--ra", "te") + r"\b", "closedloop --speed"),
    (joined("min_m_s: ", "0.5") + r"\b", "our shipped clip 0.6"),
    (joined("max_m_s: ", "2.2") + r"\b", "our shipped clip 2.0"),
    (joined("figures the field ", "reports"), "figures recalled from memory"),
    (r"4282[^\n]*" + joined("Sec", r"\. I"), "no section numbers for the social force paper"),
    (r"^\s*#.*" + joined("ARCHITEC", r"TURE\.md"), "README.md (tests only: the file is not in the repository)"),
]


def searched_files():
    patterns = ["src/**/*.py", "test/**/*.py", "launch/*.xml", "config/*.yaml", "*.md", "test/data/README.md",
                "Makefile", ".ci/run", "setup.py", "setup.cfg", "package.xml"]
    files = {path.resolve() for pattern in patterns for path in REPO.glob(pattern) if path.is_file()}
    return sorted(path for path in files if path != THIS and ".venv" not in path.parts and "egg-info" not in str(path))


def hits(text, pattern):
    return [line.strip() for line in text.splitlines() if re.search(pattern, line)]


@pytest.mark.parametrize("pattern, replacement", OLD_SPELLINGS)
def test_no_old_spelling_in_code_docs_or_launch_files(pattern, replacement):
    found = {str(path.relative_to(REPO)): lines for path in searched_files()
             if (lines := hits(path.read_text(encoding="utf-8", errors="replace"), pattern))}
    assert not found, f"old spelling /{pattern}/ (now: {replacement}) in {found}"


def test_the_search_finds_what_it_looks_for(tmp_path):
    # A check that could not fail would prove nothing: each pattern matches its own old spelling.
    samples = [joined("riskbound ", "param set planner"), joined('"par', 'am", "get"'), joined("param_", "client"),
               joined("start_off", "set_s"), joined("publish_", "clock"), joined("clock", "_hz"),
               joined("--clock", "-hz"), joined("start_del", "ay_s"), joined("wait_for_sub", "scribers"),
               joined("wait_for_pub", "lishers"), joined("wait_time", "out_s"), joined("the standard ", "player"),
               joined("rate", ":=0.5"), joined("output", "_bag"), joined("output", ":=x"), joined("topics", ":=[/a]"),
               joined("--show", "-args"), joined("--pri", "nt"), joined("[la", "unch] started"),
               joined("--sto", "rage mcap"), joined("--in", "fo BAG"), joined("--out", "put BAG"),
               joined("riskbound crowd x.yaml -", "o out"), joined("riskbound closedloop --ra", "te 0.5"),
               joined("min_m_s: ", "0.5"), joined("max_m_s: ", "2.2"), joined("figures the field ", "reports"),
               joined("4282 (1995), Sec", ". II"), joined("    # see ARCHITEC", "TURE.md")]
    for (pattern, _), sample in zip(OLD_SPELLINGS, samples, strict=True):
        assert hits(sample, pattern), (pattern, sample)


def test_settings_tables_and_launch_files_use_the_new_names():
    from riskbound.logs.playback import LIST_SPECS, REPLAY_SPECS
    from riskbound.ros.recorder_node import RECORDER_SPECS

    replay = {spec.name for spec in REPLAY_SPECS} | set(LIST_SPECS)
    assert {"speed", "skip_first_s", "window_s", "repeat", "drive_sim_time", "sim_time_hz", "only_topics",
            "await_senders", "await_listeners", "await_timeout_s", "pause_before_s"} <= replay
    assert not replay & {"rate", "duration_s", "loop", "topics"}
    recorder = {spec.name for spec in RECORDER_SPECS}
    assert {"bag_dir", "bag_format"} <= recorder and not recorder & {"output", "storage"}
    for launch in (REPO / "launch").glob("*.launch.xml"):
        names = set(re.findall(r'name="([^"]+)"', launch.read_text(encoding="utf-8")))
        assert not names & {"rate", "loop", "topics", "output", "storage", "duration_s"}, launch.name


@pytest.mark.parametrize("command", sorted(SUBCOMMANDS))
def test_help_texts_carry_no_old_spelling(command):
    done = subprocess.run([sys.executable, "-m", "riskbound.cli", command, "--help"], capture_output=True,
                          text=True, timeout=120, cwd=REPO)
    assert done.returncode == 0, done.stderr
    for pattern, replacement in OLD_SPELLINGS:
        assert not hits(done.stdout, pattern), f"{command} --help: /{pattern}/ (now: {replacement})"
