"""The halt guidance table covers every reason the supervisor gives, and the README's
`## Halt reasons` table is the generated one."""
from pathlib import Path

from vservo_node.record import halts
from vservo_node.servo import HALT_REASONS

README = Path(__file__).resolve().parents[2] / "README.md"


def test_every_halt_reason_has_causes_and_checks():
    missing = sorted(set(HALT_REASONS) - set(halts.GUIDANCE))
    assert not missing, f"add guidance for {missing} to vservo_node/record/halts.py"
    for reason, g in halts.GUIDANCE.items():
        assert len(g.cause) > 20 and len(g.check) > 10, reason
    assert halts.guidance("") is None and halts.describe("too_close") == HALT_REASONS["too_close"]


def test_readme_table_is_the_generated_one():
    text = README.read_text()
    assert "\n## Halt reasons\n" in text
    assert halts.markdown_table() in text, (
        "regenerate: .venv/bin/python -c 'from vservo_node.record import halts; "
        "print(halts.markdown_table())'")
