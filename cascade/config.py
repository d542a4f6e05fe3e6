"""A team's settings in one TOML file, so the options set once (fetch policy, column names,
budgets, output places) are not retyped on every command; command-line options override it.

```toml
[fetch]
operator = "mailto:webfilter@yourorg.example"
per_host_delay = 1.0
per_host_concurrency = 2
deadline = 10
resolve = { "*.farm.test" = "127.0.0.1" }   # a wildcard covers every name below
allow_network = ["127.0.0.1/32"]

[input]
url_column = "host"
label_column = "category"
delimiter = ";"

[budget]
budget = "10%"
fetch_below = 0.8

[output]
out = "night/"          # the folder of report, demo and night (their --output)
```

Each key is the long option of the same name (``per_host_delay`` is ``--per-host-delay``);
the sections only group them, and a key applies to every command that has that option.
``cascade --config FILE config`` prints the settings in effect and where each comes from.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

from cascade.errors import UsageError

__all__ = ["SECTIONS", "load_config"]

#: The keys each section may hold (long option names with ``_`` for ``-``).
SECTIONS: dict[str, tuple[str, ...]] = {
    "fetch": ("operator", "per_host_delay", "per_host_concurrency", "deadline", "max_bytes",
              "max_redirects", "max_queue", "port", "allow_network", "resolve",
              "ignore_robots"),
    "input": ("url_column", "label_column", "delimiter", "input_format"),
    "budget": ("budget", "budget_bytes", "budget_seconds", "fetch_below",
               "operating_budget", "precision_target", "review_size"),
    "output": ("output", "out", "output_format", "store", "model"),
}


def load_config(path: str | Path) -> dict[str, Any]:
    """The settings of a TOML file as ``{option dest: value}``; ``UsageError`` (exit 2) for
    a file that cannot be read, is not TOML, or holds a key no option has."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageError(f"--config {path}: no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"--config {path}: cannot read it ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(f"--config {path}: not valid TOML ({exc})") from None
    out: dict[str, Any] = {}
    for section, table in data.items():
        if section not in SECTIONS:
            raise UsageError(f"--config {path}: unknown section [{section}]; known: "
                             f"{', '.join(f'[{s}]' for s in SECTIONS)}")
        if not isinstance(table, dict):
            raise UsageError(f"--config {path}: [{section}] must be a table")
        for key, value in table.items():
            dest = key.replace("-", "_")
            if dest not in SECTIONS[section]:
                raise UsageError(f"--config {path}: [{section}] has no key {key!r}; known: "
                                 f"{', '.join(SECTIONS[section])}")
            out[dest] = _value(path, section, key, value)
    return out


def _value(path: Path, section: str, key: str, value: Any) -> Any:
    where = f"--config {path}: [{section}] {key}"
    if key == "resolve":
        if not isinstance(value, dict):
            raise UsageError(f"{where}: a table of name = address, e.g. "
                             '{ "*.farm.test" = "127.0.0.1" }')
        items = []
        for host, address in value.items():
            for one in address if isinstance(address, list) else [address]:
                items.append(f"{host}:{one}")
        return items
    if key in ("allow_network", "port"):
        values = value if isinstance(value, list) else [value]
        if key == "port" and not all(isinstance(v, int) and not isinstance(v, bool)
                                     for v in values):
            raise UsageError(f"{where}: whole numbers")
        return [str(v) if key == "allow_network" else v for v in values]
    if isinstance(value, dict | list):
        raise UsageError(f"{where}: one value, not a {type(value).__name__}")
    return value
