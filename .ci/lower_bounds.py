"""Print a pip constraints file pinning every requirement to its lower bound.

Usage: ``python .ci/lower_bounds.py requirements.txt > lower.txt``, then
``pip install -c lower.txt -r requirements.txt``.  The pins come from what the
requirements file says when this runs, so a new requirement or a raised bound
is tested at its lower end without editing CI.  A requirement without a lower
bound (``>=``, ``~=`` or ``==``) cannot be pinned; it is named on stderr and
left to the resolver.  Only the standard library is used, because this runs
before anything is installed.
"""
import re
import sys

_REQUIREMENT = re.compile(r"^\s*([A-Za-z0-9][A-Za-z0-9._-]*)\s*(\[[^\]]*\])?\s*(.*)$")
_LOWER = re.compile(r"(~=|==|>=)\s*([0-9][^,;\s]*)")


def lower_bounds(lines):
    """Yield ``name==version`` for each requirement line with a lower bound."""
    for raw in lines:
        line = raw.split("#", 1)[0].strip()
        if not line or line.startswith("-"):
            continue
        match = _REQUIREMENT.match(line)
        if match is None:
            raise SystemExit(f"lower_bounds: cannot read requirement line {raw!r}")
        name, _extras, spec = match.groups()
        spec = spec.split(";", 1)[0]
        bounds = _LOWER.findall(spec)
        if not bounds:
            print(f"lower_bounds: {name} has no lower bound; left to the resolver",
                  file=sys.stderr)
            continue
        yield f"{name}=={bounds[0][1]}"


def main(argv):
    path = argv[1] if len(argv) > 1 else "requirements.txt"
    with open(path, encoding="utf-8") as handle:
        for pin in lower_bounds(handle):
            print(pin)


if __name__ == "__main__":
    main(sys.argv)
