"""Print the config reference table (Markdown) from the config schema, for the README."""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from gridflow.config import Config  # noqa: E402
from gridflow.config.schema import reference_rows  # noqa: E402


def main() -> None:
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
        print(f"| `{key}` | {default.replace('|', '/')} | {doc.replace('|', '/')} |")


if __name__ == "__main__":
    main()
