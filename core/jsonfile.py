"""Reading a JSON file a person gave us, with errors a person can act on."""
from __future__ import annotations

import json
from pathlib import Path

from .errors import KinemarkError


def read_json(path: str | Path, *, what: str = "file"):
    """The parsed JSON of ``path``; every failure is a KinemarkError naming the file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise KinemarkError(f"{what} not found", where=str(path)) from None
    except (OSError, UnicodeDecodeError) as e:
        raise KinemarkError(f"cannot read {what}: {e}", where=str(path)) from None
    try:
        return json.loads(text)
    except json.JSONDecodeError as e:
        raise KinemarkError(f"not valid JSON (line {e.lineno}, column {e.colno}: {e.msg})",
                            where=str(path)) from None
    except RecursionError:
        raise KinemarkError("not a usable JSON file: its lists or objects are nested too deeply",
                            where=str(path)) from None
    except ValueError as e:     # e.g. an integer literal longer than Python converts (4300 digits)
        raise KinemarkError(f"not a usable JSON file: {e}", where=str(path)) from None
