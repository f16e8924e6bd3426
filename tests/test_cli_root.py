"""The root ``routeplan`` group: errors in its own options, with and without ``--json``.

A script that passes ``--json`` reads stdout as JSON, failures included: ``{"error": MESSAGE,
"exit_code": N}`` (README, Command reference; common practice for machine-readable output).
Usage errors exit with 2 (click's ``UsageError.exit_code``; routeplan's exit-code contract in
the ``routeplan.cli`` docstring).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from conftest import assert_json_failure

from routeplan.cli import cli


def _invoke(args: list[str], env: dict[str, str] | None = None):
    return CliRunner().invoke(cli, args, env=env)


def _json_failure(result, *fragments: str) -> dict:
    """Exit 2, the JSON failure on stdout, and click's own message on stderr."""
    data = assert_json_failure(result, *fragments)
    assert "Traceback" not in result.stderr
    for fragment in fragments:
        assert fragment in result.stderr, (fragment, result.stderr)
    return data


def test_an_unknown_root_option_with_json_is_json_on_stdout(tmp_path):
    result = _invoke(["--workspace", str(tmp_path), "--no-such-root-option", "status", "--json"])
    _json_failure(result, "No such option", "--no-such-root-option")


@pytest.mark.parametrize("via", ["option", "environment"])
def test_a_bad_workspace_value_with_json_is_json_on_stdout(tmp_path, via):
    # --workspace is a click.Path(file_okay=False): a regular file is refused while parsing
    # (click documentation, click.Path), before any command runs
    a_file = tmp_path / "not_a_folder.txt"
    a_file.write_text("x")
    if via == "option":
        result = _invoke(["--workspace", str(a_file), "status", "--json"])
    else:
        result = _invoke(["status", "--json"], env={"ROUTEPLAN_WORKSPACE": str(a_file)})
    _json_failure(result, str(a_file), "is a file")


def test_a_root_usage_error_without_json_prints_nothing_on_stdout(tmp_path):
    result = _invoke(["--workspace", str(tmp_path), "--no-such-root-option", "status"])
    assert result.exit_code == 2 and result.stdout == ""
    assert "No such option" in result.stderr


def test_json_after_the_double_dash_is_an_argument_not_the_flag(tmp_path):
    # POSIX Utility Syntax Guidelines, guideline 10: "--" ends the options
    result = _invoke(["--workspace", str(tmp_path), "--no-such-root-option", "cases", "import", "--", "--json"])
    assert result.exit_code == 2 and result.stdout == ""


def test_a_usage_error_in_a_command_keeps_its_json_failure(tmp_path):
    # the path that worked before the root options were covered: click raises it while parsing
    # the subcommand, inside the root group's invoke
    result = _invoke(["--workspace", str(Path(tmp_path)), "status", "--json", "--no-such-option"])
    _json_failure(result, "No such option", "--no-such-option")
