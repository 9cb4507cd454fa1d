#!/usr/bin/env python3
"""The module graph of each crate, read from its `crate::` and `super::`
paths (comments left out): exits 1 when two modules of one crate import
each other, directly or round a longer circle, or when a floor of
decoder-core imports one above it. ARCHITECTURE.md names the floors."""
import re
import sys
from pathlib import Path

CRATES = ["decoder-core/src", "daemon/src", "replay-tool/src"]

# decoder-core's floors, lowest first; a module may import its own floor
# and those below it, never one above.
FLOORS = [
    {"linalg", "bin_width"},
    {"wire"},
    {"decoders"},
    {"engine"},
    {"formats"},
    {"fit", "sim"},
    {"session"},
]
FLOOR_OF = {name: i for i, names in enumerate(FLOORS) for name in names}

PATH = re.compile(r"\b(crate|super)((?:::[a-z_][a-z0-9_]*)+)")
GROUP = re.compile(r"\buse crate::\{([^}]*)\}")


def module_of(src: Path, file: Path) -> tuple:
    parts = list(file.relative_to(src).with_suffix("").parts)
    if parts[-1] in ("mod", "lib", "main"):
        parts = parts[:-1]
    return tuple(parts)


def resolve(modules: set, path: tuple) -> tuple:
    """The deepest module named by a path's leading segments."""
    for n in range(len(path), 0, -1):
        if path[:n] in modules:
            return path[:n]
    return ()


def edges(src: Path):
    files = sorted(src.rglob("*.rs"))
    modules = {module_of(src, f) for f in files}
    graph = {m: set() for m in modules}
    for f in files:
        here = module_of(src, f)
        is_mod_file = f.stem in ("mod", "lib", "main")
        text = "\n".join(
            line.split("//")[0] for line in f.read_text().splitlines()
        )
        # A file's own unit tests (`mod tests`, `super::*`) are the file.
        cut = text.find("#[cfg(test)]")
        if cut >= 0:
            text = text[:cut]
        paths = []
        for m in PATH.finditer(text):
            segs = tuple(m.group(2).split("::")[1:])
            if m.group(1) == "crate":
                paths.append(segs)
            else:
                parent = here if is_mod_file else here[:-1]
                paths.append(parent[:-1] + segs if is_mod_file else parent + segs)
        for m in GROUP.finditer(text):
            for item in m.group(1).split(","):
                item = item.strip()
                if item:
                    paths.append(tuple(item.split("::")))
        for p in paths:
            target = resolve(modules, p)
            if target and target != here and not here[: len(target)] == target:
                graph[here].add(target)
    return graph


def circles(graph):
    """Each strongly connected set of more than one module (Tarjan)."""
    index, low, stack, on, out = {}, {}, [], set(), []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(comp)

    sys.setrecursionlimit(10000)
    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def name(m):
    return "::".join(m) or "crate"


def main() -> int:
    root = Path(__file__).resolve().parent.parent
    failed = False
    for crate in CRATES:
        src = root / crate
        graph = edges(src)
        for comp in circles(graph):
            failed = True
            print(f"{crate}: modules import each other in a circle: "
                  + ", ".join(sorted(name(m) for m in comp)), file=sys.stderr)
        if crate == "decoder-core/src":
            for m, targets in sorted(graph.items()):
                if not m or m[0] not in FLOOR_OF:
                    continue
                for t in sorted(targets):
                    if t and t[0] in FLOOR_OF and FLOOR_OF[t[0]] > FLOOR_OF[m[0]]:
                        failed = True
                        print(f"{crate}: {name(m)} imports {name(t)}, a floor above it",
                              file=sys.stderr)
    if not failed:
        print("module graph: no circles, every floor imports only its own and those below")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
