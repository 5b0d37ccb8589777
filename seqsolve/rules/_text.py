"""Small helpers for the sentences rules print."""


def quoted(labels) -> str:
    items = [f"'{x}'" for x in labels]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " or " + items[-1]


def targets_phrase(items, what: str = "condition") -> str:
    return f"any one {what}" if items is None else quoted(items)


def trials(n: int) -> str:
    """'1 trial', '2 trials'."""
    return f"{n} trial" if n == 1 else f"{n} trials"


def rule_line(source: str, label: str | None, sentence: str) -> str:
    """How check, audit and the report name a rule: its label where given, where it comes from, the sentence."""
    return f"{label} ({source}): {sentence}" if label else f"{source}: {sentence}"
