"""Small helpers for the sentences rules print."""


def quoted(labels) -> str:
    items = [f"'{x}'" for x in labels]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " or " + items[-1]


def targets_phrase(items, what: str = "condition") -> str:
    return f"any one {what}" if items is None else quoted(items)
