"""Whose gradients a bucket carries, said briefly: "encoder.layers.10–11" rather than a list of modules.

A DDP bucket's layer (``ddp.bucket.3``) tells a reader nothing about the model; the agents send which
timed layers' gradients it carries (the schema's ``carries``, docs/wire.md) and this names them as a span.
"""

from __future__ import annotations

from collections.abc import Sequence

MAX_PARTS = 3  # spans shown before "+N more"


def carried_label(names: Sequence[str]) -> str:
    """Module paths folded into spans of numbered blocks, in the given (model) order.

    Each name is cut after its first numeric part ("encoder.layers.10.mlp.fc1" -> block "encoder.layers.10");
    blocks under one prefix with consecutive numbers join into a range ("encoder.layers.10–11"). A lone
    name is shown whole; names without a number stay as they are."""
    if len(names) == 1:
        return names[0]
    parts: list[tuple[str, list[int]]] = []  # (prefix, numbers) or (whole name, [])
    for name in names:
        pieces = name.split(".")
        k = next((i for i, piece in enumerate(pieces) if piece.isdigit()), None)
        if k is None:
            if not parts or parts[-1] != (name, []):
                parts.append((name, []))
            continue
        prefix, number = ".".join(pieces[:k]), int(pieces[k])
        if parts and parts[-1][0] == prefix and parts[-1][1]:
            numbers = parts[-1][1]
            if number not in numbers:
                numbers.append(number)
        else:
            parts.append((prefix, [number]))
    spans = [span for prefix, numbers in parts for span in _spans(prefix, numbers)]
    if len(spans) > MAX_PARTS:
        return ", ".join(spans[:MAX_PARTS]) + f" +{len(spans) - MAX_PARTS} more"
    return ", ".join(spans)


def _spans(prefix: str, numbers: list[int]) -> list[str]:
    if not numbers:
        return [prefix]
    lead = f"{prefix}." if prefix else ""
    spans, ordered = [], sorted(numbers)
    first = last = ordered[0]
    for n in [*ordered[1:], None]:
        if n is not None and n == last + 1:
            last = n
            continue
        spans.append(f"{lead}{first}" if first == last else f"{lead}{first}–{last}")
        if n is not None:
            first = last = n
    return spans
