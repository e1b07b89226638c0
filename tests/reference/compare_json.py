"""Compare two JSON fixture files number by number (relative tolerance 1e-9, absolute 1e-12).

Used by scripts/test.sh: every reference script in tests/reference is re-run into a temporary file and
the result compared with the committed fixture, so a fixture cannot drift from the script that made it.
"""
import json
import math
import sys


def walk(a, b, path, errors):
    if isinstance(a, dict) and isinstance(b, dict):
        if set(a) != set(b):
            errors.append(f"{path}: keys differ: {sorted(set(a) ^ set(b))}")
            return
        for k in a:
            walk(a[k], b[k], f"{path}.{k}", errors)
    elif isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            errors.append(f"{path}: lengths {len(a)} vs {len(b)}")
            return
        for i, (x, y) in enumerate(zip(a, b)):
            walk(x, y, f"{path}[{i}]", errors)
    elif isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        if math.isnan(a) and math.isnan(b):
            return
        if not math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12):
            errors.append(f"{path}: {a!r} vs {b!r}")
    elif a != b:
        errors.append(f"{path}: {a!r} vs {b!r}")


def main():
    with open(sys.argv[1]) as f:
        a = json.load(f)
    with open(sys.argv[2]) as f:
        b = json.load(f)
    errors = []
    walk(a, b, "$", errors)
    if errors:
        print(f"{sys.argv[1]} differs from a fresh run of its script:")
        for e in errors[:20]:
            print("  " + e)
        sys.exit(1)


if __name__ == "__main__":
    main()
