"""What a verb prints after its work: a result's summary and the files written, or with
``--json`` the result's plain data and the files, nothing with ``--quiet``."""
from __future__ import annotations

import json

from povmfit.fitting.data.files import json_safe

__all__ = ["print_result"]


def print_result(result, files: dict, args, leave_out=()) -> None:
    """``result`` has ``summary()`` and ``to_dict()``; ``leave_out`` names bulky keys of the
    JSON summary; ``files`` is {name: path}."""
    if args.json:
        summary = {key: value for key, value in result.to_dict().items() if key not in leave_out}
        summary["outputs"] = {name: str(path) for name, path in files.items()}
        print(json.dumps(json_safe(summary), indent=2))
    elif not args.quiet:
        print(result.summary())
        print()
        width = max((len(name) for name in files), default=0) + 1
        for name, path in files.items():
            print(f"wrote {name:<{width}} {path}")
