"""The configuration file: what loads, what it means, and one clear line for each mistake."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from pipeline.cli import main
from pipeline.config import STARTER_TEXT, load_config, parse_duration
from pipeline.errors import UsageError
from tests.conftest import REPO, write


def test_starter_file_written_by_init_loads_and_means_what_its_comments_say(tmp_path, capsys):
    target = tmp_path / "upwell.toml"
    assert main(["init", str(target)]) == 0
    assert target.read_text() == STARTER_TEXT
    # tomllib is the standard library's TOML 1.0 reader: the starter must be plain TOML.
    tomllib.loads(target.read_text())
    config = load_config(target)
    assert config.index_path == (tmp_path / "index").resolve()
    assert (config.server.host, config.server.port) == ("127.0.0.1", 8765)
    (source,) = config.sources
    assert source.name == "handbook" and source.watch and source.every == 15 * 60
    # the built-in temp-file patterns stay, the configured one is added
    assert "**/*.swp" in source.exclude and "**/drafts/**" in source.exclude
    # a second init does not overwrite
    target.write_text("# edited by hand\n")
    assert main(["init", str(target)]) == 2
    assert "exists" in capsys.readouterr().err
    assert target.read_text() == "# edited by hand\n"
    # --force overwrites it with the starter again
    assert main(["init", str(target), "--force"]) == 0
    assert target.read_text() == STARTER_TEXT


def test_example_config_in_ops_loads():
    config = load_config(REPO / "ops" / "upwell.example.toml")
    assert config.sources and config.index_path is not None
    assert all(s.path.is_absolute() for s in config.sources)


@pytest.mark.parametrize(
    "text, seconds",
    [("30s", 30), ("15m", 900), ("1h", 3600), ("1h30m", 5400), ("0.5s", 0.5), ("2h5m10s", 7510)],
)
def test_durations(text, seconds):
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["", "15", "m", "1d", "-5m", "0s", "15 minutes"])
def test_bad_durations_are_refused(text):
    with pytest.raises(ValueError):
        parse_duration(text)


@pytest.mark.parametrize(
    "body, key, words",
    [
        ("[index]\npath = 5\n", "index.path", "string"),
        ('[index]\npaht = "x"\n', "index.paht", "unknown key"),
        ('[server]\nlisten = "localhost"\n', "server.listen", "HOST:PORT"),
        ('[server]\nlisten = "0.0.0.0:8765"\n', "server.listen", "token_env"),
        ("[service]\nsettle = 1\n", "service.settle", "string"),
        ('[service]\nmaintenance_at = "25:00"\n', "service.maintenance_at", "time of day"),
        ("[service]\nbatch_documents = 0\n", "service.batch_documents", "at least 1"),
        ("[service]\ncompact_fragments = 0\n", "service.compact_fragments", "at least 1"),
        ("[service]\ncompact_every = 600\n", "service.compact_every", "string"),
        ('[service]\ncompact_quiet = "0s"\n', "service.compact_quiet", "positive"),
        ('[service]\nauto_compact = "yes"\n', "service.auto_compact", "true"),
        ('[[source]]\npath = "/srv/x"\n', "source[0].name", "required"),
        ('[[source]]\nname = "a b"\npath = "/x"\n', "source[0].name", "letters"),
        ('[[source]]\nname = "hb"\npath = "/x"\nevery = "soon"\n', "source 'hb'.every", "dur"),
        ('[[source]]\nname = "hb"\npath = "/x"\nkind = "ftp"\n', "source 'hb'.kind", "kind"),
        ('[[source]]\nname = "hb"\npath = "/x"\ninclude = "*.md"\n', "source 'hb'.include", "list"),
        ('[[source]]\nname = "hb"\npath = "/x"\nwatch = "yes"\n', "source 'hb'.watch", "true"),
        ('[[source]]\nname = "hb"\npath = "/x"\nocr = "off"\n', "source 'hb'.ocr", "true"),
        (
            '[[source]]\nname = "hb"\npath = "/x"\n[[source]]\nname = "hb"\npath = "/y"\n',
            "source[1].name",
            "two sources",
        ),
        ("[index\n", "not valid TOML", "TOML"),
    ],
)
def test_a_bad_file_is_one_line_naming_the_key(tmp_path, body, key, words):
    path = write(tmp_path / "bad.toml", body)
    with pytest.raises(UsageError) as caught:
        load_config(path)
    message = str(caught.value)
    assert "\n" not in message
    assert message.startswith(f"config {path}: ")
    assert key in message and words in message


def test_automatic_compaction_keys(tmp_path):
    path = write(
        tmp_path / "upwell.toml",
        '[service]\nauto_compact = false\ncompact_fragments = 6\ncompact_every = "15m"\n'
        'compact_quiet = "5s"\n',
    )
    service = load_config(path).service
    assert service.auto_compact is False
    assert (service.compact_fragments, service.compact_every, service.compact_quiet) == (6, 900, 5)


def test_cli_reports_a_bad_config_as_one_line_with_exit_2(tmp_path, capsys):
    path = write(tmp_path / "bad.toml", '[server]\nlisten = "10.1.2.3:80"\n')
    assert main(["--config", str(path), "status"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "server.listen" in err


def test_upwell_config_env_and_sync_sources_from_the_file(tmp_path, monkeypatch, capsys):
    for name in ("handbook", "policies"):
        write(tmp_path / name / f"{name}.md", f"# {name}\n\nMarrowby {name} text for the test.\n")
    cfg = write(
        tmp_path / "upwell.toml",
        '[index]\npath = "ix"\nmodel = "hash"\n'
        '[[source]]\nname = "hb"\npath = "handbook"\n'
        '[[source]]\nname = "pol"\npath = "policies"\n',
    )
    monkeypatch.setenv("UPWELL_CONFIG", str(cfg))
    assert main(["sync", "--source", "pol", "--json"]) == 0
    capsys.readouterr()
    assert main(["status", "--json"]) == 0
    assert '"pol"' in capsys.readouterr().out
    assert main(["sync"]) == 0  # every configured source
    capsys.readouterr()
    assert main(["status"]) == 0
    out = capsys.readouterr().out
    assert "source:    hb: 1 documents" in out and "source:    pol: 1 documents" in out
    assert Path(tmp_path / "ix").is_dir()
    assert main(["sync", "--source", "nope"]) == 2
    assert "no source named 'nope'" in capsys.readouterr().err


def test_ocr_false_reaches_the_folder_connector_and_an_image_is_skipped_with_the_reason(tmp_path):
    from PIL import Image

    from pipeline.index import Index

    share = tmp_path / "share"
    share.mkdir()
    (share / "notes.md").write_text("# Notes\n\nThe seat clamp takes 6 Nm.\n")
    Image.new("L", (40, 20), 255).save(share / "board.png")
    path = write(
        tmp_path / "upwell.toml",
        f'[index]\npath = "{tmp_path / "idx"}"\n'
        f'[[source]]\nname = "share"\npath = "{share}"\nocr = false\n',
    )
    config = load_config(path)
    (source,) = config.sources
    assert source.ocr is False and source.connector().ocr is False
    report = Index(tmp_path / "idx").sync([source.connector()], yes=True)
    failures = {item.path: item.reason for item in report.failures}
    assert any("OCR is off" in reason for reason in failures.values()), failures


def test_ocr_false_is_a_key_of_every_source_kind(tmp_path):
    from pipeline.config import parse_config

    config = parse_config(
        {
            "source": [
                {
                    "name": "scans-bucket",
                    "kind": "s3",
                    "bucket": "marrowby-scans",
                    "endpoint_url": "http://127.0.0.1:9000/",
                    "every": "10m",
                    "ocr": False,
                }
            ]
        },
        tmp_path / "upwell.toml",
    )
    (source,) = config.sources
    built = source.connector(tmp_path / "state")
    assert source.ocr is False and built.ocr is False
    assert "ocr" not in source.options
