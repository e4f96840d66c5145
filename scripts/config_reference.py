"""Print the config reference table (Markdown) from the config schema, for the README.

``--fields`` prints the table of valid and plausible values of mapped fields instead
(:data:`gridflow.io.validate.FIELD_RANGES`).
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from gridflow.config import Config  # noqa: E402
from gridflow.config.ranges import range_for  # noqa: E402
from gridflow.config.schema import reference_rows  # noqa: E402


def fields_table() -> str:
    from gridflow.io.validate import range_table_rows

    rows = ["| role | field | valid (else exit 2) | plausible (else a warning finding) | "
            "source of the plausible range |", "| --- | --- | --- | --- | --- |"]
    for role, f, valid, plausible, source in range_table_rows():
        rows.append(f"| {role} | `{f}` | {valid or 'any finite number'} | {plausible or '-'} | "
                    f"{source or '-'} |")
    return "\n".join(rows)


def main() -> None:
    if "--fields" in sys.argv[1:]:
        print(fields_table())
        return
    print("| key | default | meaning |")
    print("| --- | --- | --- |")
    for key, default, doc in reference_rows(Config):
        if key in ("raw", "base_dir", "path", "sha256"):
            continue
        parts = key.split(".")
        if parts[0] == "layers" and len(parts) > 2:
            if parts[1] != "pipes":
                continue
            key = "layers.<role>." + ".".join(parts[2:])
        elif parts[0] == "layers" and len(parts) == 2 and parts[1] != "pipes":
            key = f"layers.{parts[1]}"
        r = range_for(".".join(parts)) if parts[0] != "layers" else \
            range_for("layers.x." + ".".join(parts[2:])) if len(parts) > 2 else None
        if r is not None:
            doc = f"{doc} (valid: {r.text()})"
        print(f"| `{key}` | {default.replace('|', '/')} | {doc.replace('|', '/')} |")


if __name__ == "__main__":
    main()
