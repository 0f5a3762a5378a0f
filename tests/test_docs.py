"""The documentation names what the code does."""

from pathlib import Path

from lodeline.cli import _markdown
from lodeline.runner import discover_stages

ROOT = Path(__file__).resolve().parents[1]


def test_configuration_reference_matches_code():
    """docs/configuration.md is `lodeline stages --markdown`: regenerate it when a parameter changes."""
    text = (ROOT / "docs" / "configuration.md").read_text()
    assert text == _markdown(discover_stages())


def test_cautions_are_stated():
    for name in ("README.md", "DEVELOPERS.md"):
        text = " ".join((ROOT / name).read_text().lower().split())
        assert "never replace" in text and "clearance certificate" in text and "regulations" in text, name
