"""Human-readable description of the message table (used by ``tetherloop protocol --describe``)."""

from __future__ import annotations

from .messages import MESSAGES, field_specs, _SIZES


def _size_text(spec) -> str:
    fixed = 0
    var = False
    for f in spec.fields:
        if f.wire in _SIZES:
            fixed += _SIZES[f.wire]
        else:
            var = True
    return f"{fixed}+" if var else str(fixed)


def describe_text(markdown: bool = False) -> str:
    lines: list[str] = []
    for type_id in sorted(MESSAGES):
        spec = MESSAGES[type_id]
        states = "any" if len(spec.legal_in) == 4 else ",".join(
            s.name.lower() for s in sorted(spec.legal_in))
        head = f"0x{type_id:02X} {spec.name}  (from {spec.sender}, payload {_size_text(spec)} bytes"
        if spec.sender == "host":
            head += f", legal in: {states}, reply: {' | '.join(spec.replies) or 'none'}"
        head += ")"
        if markdown:
            lines.append(f"### {head}\n\n{spec.doc}\n")
            lines.append("| field | type | unit | meaning |\n|---|---|---|---|")
        else:
            lines.append(head)
            lines.append(f"    {spec.doc}")
        for f in spec.fields:
            doc = f.doc
            if f.enum is not None:
                doc += " (" + ", ".join(f"{e.value}={e.name}" for e in f.enum) + ")"
            if markdown:
                lines.append(f"| {f.name} | {f.wire} | {f.unit} | {doc} |")
            else:
                lines.append(f"    {f.name:<20} {f.wire:<5} {f.unit:<8} {doc}")
            if f.item is not None:
                for g in field_specs(f.item):
                    gdoc = g.doc
                    if g.enum is not None:
                        gdoc += " (" + ", ".join(f"{e.value}={e.name}" for e in g.enum) + ")"
                    if markdown:
                        lines.append(f"| {f.name}[].{g.name} | {g.wire} | {g.unit} | {gdoc} |")
                    else:
                        lines.append(f"      .{g.name:<17} {g.wire:<5} {g.unit:<8} {gdoc}")
        lines.append("")
    return "\n".join(lines)
