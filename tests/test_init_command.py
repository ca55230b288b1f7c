"""`fecproxy init`: profile pairs written, commented and checked; shipped files written out;
`fecproxy manual` and `fecproxy completion` built from the parser."""

from __future__ import annotations

import stat
from pathlib import Path

import pytest

from fecproxy import cli
from fecproxy.commands.init import EXIT_NOT_WRITTEN, EXIT_WRITTEN, PROFILES, choose_code, plan_arguments
from fecproxy.examples import shipped_files

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", sorted(PROFILES))
def test_each_profile_writes_a_pair_that_passes_the_pair_check(capsys, tmp_path, name):
    out = tmp_path / name
    assert cli.main(["init", name, str(out)]) == EXIT_WRITTEN
    assert "passes" in capsys.readouterr().out
    assert stat.S_IMODE((out / "link.key").stat().st_mode) == 0o600
    profile = PROFILES[name]
    status = cli.main(
        [
            "check",
            "--delay-spread-ms",
            str(profile.delay_spread_ms),
            str(out / "sender.yaml"),
            str(out / "receiver.yaml"),
        ]
    )
    captured = capsys.readouterr()
    assert status == 0, captured.err
    assert captured.err == ""  # keyed, metrics on loopback: nothing to warn of
    # The comments quote the plan command and the planner's choice, which the config applies.
    code = choose_code(profile)
    sender = (out / "sender.yaml").read_text()
    assert f"fecproxy plan {' '.join(plan_arguments(profile))}" in sender
    assert f"block_size: {code.k}\n  repair: {code.m}\n  interleave: {code.depth}\n" in sender


def test_profiles_plan_line_matches_the_plan_command(capsys):
    profile = PROFILES["geo-satellite"]
    argv = ["plan", *" ".join(plan_arguments(profile)).split()]
    assert cli.main(argv) == 0
    code = choose_code(profile)
    assert f"recommended (*): k={code.k} m={code.m} interleave D={code.depth}" in capsys.readouterr().out


def test_init_never_overwrites(capsys, tmp_path):
    assert cli.main(["init", "telemetry-radio", str(tmp_path)]) == EXIT_WRITTEN
    key = (tmp_path / "link.key").read_bytes()
    assert cli.main(["init", "telemetry-radio", str(tmp_path)]) == EXIT_NOT_WRITTEN
    assert "already exists; nothing written" in capsys.readouterr().err
    assert (tmp_path / "link.key").read_bytes() == key


def test_shipped_files_are_the_repository_s_config_and_deploy(capsys, tmp_path):
    repository = {
        str(path.relative_to(ROOT))
        for folder in ("config", "deploy")
        for path in (ROOT / folder).rglob("*")
        if path.is_file()
    }
    assert {path for path, _ in shipped_files()} == repository
    assert cli.main(["init", "--shipped", str(tmp_path)]) == EXIT_WRITTEN
    for path in repository:
        assert (tmp_path / path).read_bytes() == (ROOT / path).read_bytes()


def test_manual_page_and_completion_cover_subcommand_options(capsys):
    assert cli.main(["manual"]) == 0
    page = capsys.readouterr().out
    assert page.startswith(".TH FECPROXY") and r"\-\-delay\-spread\-ms" in page
    assert cli.main(["completion", "bash"]) == 0
    assert "--delay-spread-ms" in capsys.readouterr().out
