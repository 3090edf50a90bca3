"""docs/settings.md lists every setting once, word for word as jobdesk/settings.py declares it
(type, default, config-file key, environment variable, argument, traitlet, meaning), and the
server's traitlets are the ones it names: the page cannot drift from the code."""

import re
from pathlib import Path

from jobdesk import settings
from jobdesk.server import JobdeskServer

DOC = Path(__file__).resolve().parents[1] / "docs" / "settings.md"


def _table_rows() -> list[str]:
    lines = DOC.read_text(encoding="utf-8").splitlines()
    start = lines.index("## Every setting")
    rows = []
    for line in lines[start:]:
        if line.startswith("| `"):
            rows.append(line)
        elif rows and not line.startswith("|"):
            break
    return rows


def test_the_table_is_the_dataclass_word_for_word():
    assert _table_rows() == settings.reference_rows(), \
        "docs/settings.md differs from jobdesk/settings.py: copy settings.reference_rows()"


def test_every_setting_is_listed_once_on_the_page():
    named = [re.match(r"\| `([a-z_]+)` \|", row).group(1) for row in _table_rows()]
    assert named == settings.names()
    assert len(named) == len(set(named))
    assert "sources" not in named   # where values came from is not a setting


def test_the_traitlets_named_are_the_servers_with_the_same_meaning():
    named = {}
    for name in settings.names():
        traitlet = settings.about(name)["traitlet"]
        if traitlet != "—":
            cls, trait = traitlet.strip("`").split(".")
            assert cls == JobdeskServer.__name__
            named[trait] = name
    traits = JobdeskServer.class_traits(config=True)
    assert set(named) == set(traits)
    for trait, name in named.items():
        assert traits[trait].help == settings.about(name)["meaning"], trait


def test_every_environment_variable_on_the_page_is_one_the_builder_reads(tmp_path):
    page = DOC.read_text(encoding="utf-8")
    documented = set(re.findall(r"`(JOBDESK_[A-Z_]+)`", page))
    read = {settings.about(n)["env"] for n in settings.names()} - {"—"}
    assert documented == read
    # and each really is read: a value set in the variable shows up in the settings
    env = {"JOBDESK_HOME": str(tmp_path / "d")}
    for name in settings.names():
        var = settings.about(name)["env"]
        if var != "—" and name not in ("root", "config_file"):
            value = "7" if settings.about(name)["kind"] != "text" else "lab-7"
            got = getattr(settings.build(environ={**env, var: value}), name)
            assert str(got) in ("7", "7.0", "lab-7"), (var, got)
