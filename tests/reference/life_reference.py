#!/usr/bin/env python3
"""Independent reference simulator for deeptime's whole-system tests.

It runs two-state rules on the eight neighbours (B/S notation with the
letters of Hensel notation) the plain way: a numpy boolean grid, padded so
that nothing reaches its edge, and each cell's neighbourhood numbered by
scipy's 2-D correlation with a 3x3 window of weights, looked up in the
rule's tables. A rule with B0 brings every empty cell of the plane to life:
the grid then keeps the true cells and an explicit state for every cell
outside it (the background), and steps the whole grid with the outside in
that state. It shares no code with
the Rust engine: it has its own rule parser, RLE reader and writer, and its own
computation of the state digest from the grid. tests/reference.rs drives it:

  soup     write a seeded random N x N soup as RLE (top-left cell at (0, 0))
  expect   run a pattern and record, at each listed generation, the
           population, bounding box, digest and live cells
  compare  check deeptime's --json report and --out RLE against those records;
           on any mismatch print a diff and exit 1
  census   take a settled state apart into named objects (the fate census)
  selftest check this file's digest, RLE and step code on cases reasoned by hand

Every check names its source in a comment: "independent reference:
numpy/scipy", "common practice" or "from memory".  The packages are imported
unconditionally: a missing one fails the run loudly.
"""

import argparse
import json
import random
import re
import sys

import blake3
import numpy as np
import scipy.ndimage

# ---------------------------------------------------------------- rules


# Hensel notation's letters: one picture per letter of the counts 1 to 4,
# rows top to bottom, "x" a live neighbour, the centre always ".". Each
# letter names its picture and the picture's images under the eight
# symmetries of the square; a count n above 4 names with letter x the
# complements of (8 - n)x. Source: LifeWiki, "Isotropic non-totalistic
# rule" (the table is pictures there; written out here from memory of it,
# independently of the engine's table).
LETTER_PICTURES = {
    1: {"c": "..x/.../...", "e": ".x./.../..."},
    2: {"c": "..x/.../..x", "e": ".x./..x/...", "k": ".x./.../..x",
        "a": ".xx/.../...", "i": ".x./.../.x.", "n": "..x/.../x.."},
    3: {"c": "..x/.../x.x", "e": ".x./..x/.x.", "k": ".x./..x/x..",
        "a": ".xx/..x/...", "i": "xxx/.../...", "n": ".xx/.../..x",
        "y": ".x./.../x.x", "q": ".xx/.../x..", "j": ".xx/x../...",
        "r": ".xx/.../.x."},
    4: {"c": "x.x/.../x.x", "e": ".x./x.x/.x.", "k": ".xx/x../..x",
        "a": ".xx/..x/..x", "i": ".xx/.../.xx", "n": "xxx/.../..x",
        "y": ".xx/.../x.x", "q": ".xx/..x/x..", "j": ".xx/x../.x.",
        "r": ".xx/..x/.x.", "t": "xxx/.../.x.", "w": ".xx/x../x..",
        "z": ".xx/.../xx."},
}

# Each neighbourhood as a number: the weight of each neighbour's place in the
# 3x3 window, row by row (a layout of this file's own).
WEIGHTS = np.array([[1, 2, 4], [8, 0, 16], [32, 64, 128]], dtype=np.int32)


def picture_array(picture):
    return np.array([[ch == "x" for ch in row] for row in picture.split("/")], dtype=bool)


def window_index(window):
    """The number of a 3x3 window's neighbourhood (its centre ignored)."""
    return int((window.astype(np.int32) * WEIGHTS).sum())


def images(window):
    """The window under the eight symmetries: four quarter turns of it and of
    its mirror image (numpy's rot90 and fliplr)."""
    out = []
    for base in (window, np.fliplr(window)):
        for turns in range(4):
            out.append(np.rot90(base, turns))
    return out


def build_letter_classes():
    """(count, letter) -> the set of neighbourhood numbers it names."""
    classes = {}
    for count, pictures in LETTER_PICTURES.items():
        for letter, picture in pictures.items():
            window = picture_array(picture)
            named = {window_index(w) for w in images(window)}
            classes[(count, letter)] = named
            if count < 4:
                complement = ~window
                complement[1, 1] = False
                classes[(8 - count, letter)] = {window_index(w) for w in images(complement)}
    return classes


LETTER_CLASSES = build_letter_classes()


def letters_of(count):
    return sorted(letter for c, letter in LETTER_CLASSES if c == count)


def neighbourhoods_with(count):
    return {i for i in range(256) if bin(i).count("1") == count}


RULE_PART_RE = re.compile(r"([0-8])(-?)([a-z]*)")


def parse_part(text, rule_text):
    """The set of neighbourhood numbers a B or S part names."""
    named = set()
    at = 0
    while at < len(text):
        match = RULE_PART_RE.match(text, at)
        if not match or match.end() == at:
            raise ValueError(f"rule {rule_text!r}: cannot read {text[at:]!r}")
        count, minus, letters = int(match.group(1)), match.group(2), match.group(3)
        if minus and not letters:
            raise ValueError(f"rule {rule_text!r}: '-' with no letter after it")
        for letter in letters:
            if (count, letter) not in LETTER_CLASSES:
                raise ValueError(f"rule {rule_text!r}: {count} has no letter {letter!r}")
        if not letters:
            named |= neighbourhoods_with(count)
        else:
            listed = set().union(*(LETTER_CLASSES[(count, l)] for l in letters))
            named |= (neighbourhoods_with(count) - listed) if minus else listed
        at = match.end()
    return named


RULE_RE = re.compile(r"^B([0-8a-z-]*)/?S([0-8a-z-]*)$")


class Rule:
    """A two-state rule on the eight neighbours, in B/S notation with the
    letters of Hensel notation: which neighbourhoods give birth and which
    survival, as tables indexed by neighbourhood number."""

    def __init__(self, text):
        match = RULE_RE.match(text.strip())
        if not match:
            raise ValueError(f"rule {text!r} is not in the form B<counts>/S<counts>")
        self.birth_set = parse_part(match.group(1), text)
        self.survive_set = parse_part(match.group(2), text)
        # B0: a cell with no live neighbour is born (empty space comes alive).
        self.b0 = 0 in self.birth_set
        self.birth_table = np.zeros(256, dtype=bool)
        self.birth_table[sorted(self.birth_set)] = True
        self.survive_table = np.zeros(256, dtype=bool)
        self.survive_table[sorted(self.survive_set)] = True

    def canonical(self):
        """B, each count with its letters (alphabetical), or '-' and the
        letters left out when that is shorter, then /S the same way."""
        def part(named):
            out = ""
            for count in range(9):
                letters = letters_of(count)
                if not letters:
                    if neighbourhoods_with(count) <= named:
                        out += str(count)
                    continue
                inside = [l for l in letters if LETTER_CLASSES[(count, l)] <= named]
                outside = [l for l in letters if l not in inside]
                if not inside:
                    continue
                out += str(count)
                if outside and len(outside) < len(inside):
                    out += "-" + "".join(outside)
                elif outside:
                    out += "".join(inside)
            return out
        return "B" + part(self.birth_set) + "/S" + part(self.survive_set)

    def next_state(self, alive, window):
        """Whether the centre of a 3x3 window lives on."""
        table = self.survive_table if alive else self.birth_table
        return bool(table[window_index(window)])


# ---------------------------------------------------------------- RLE


HEADER_RE = re.compile(r"^\s*x\s*=\s*(\d+)\s*,\s*y\s*=\s*(\d+)\s*(?:,\s*rule\s*=\s*(\S+)\s*)?$")


def read_rle(text):
    """Parse RLE text; return (width, height, rule text or None, set of (x, y)).

    Common practice: lines starting with '#' are comments; the header is
    `x = W, y = H[, rule = R]`; the body is runs of `b` (dead), `o` (alive) and
    `$` (end of row), each with an optional decimal count, ending with `!`.
    Anything else is refused, so an odd writer shows up as an error here.
    """
    lines = text.splitlines()
    at = 0
    while at < len(lines) and (lines[at].startswith("#") or not lines[at].strip()):
        at += 1
    if at == len(lines):
        raise ValueError("RLE has no header line")
    header = HEADER_RE.match(lines[at])
    if not header:
        raise ValueError(f"RLE header {lines[at]!r} is not `x = W, y = H[, rule = R]`")
    width, height, rule = int(header.group(1)), int(header.group(2)), header.group(3)
    body = "".join(line.strip() for line in lines[at + 1:] if not line.startswith("#"))
    cells = set()
    x = y = 0
    count = ""
    ended = False
    for ch in body:
        if ended:
            if ch.strip():
                raise ValueError(f"RLE has {ch!r} after its closing '!'")
            continue
        if ch.isdigit():
            count += ch
            continue
        n = int(count) if count else 1
        count = ""
        if ch == "b":
            x += n
        elif ch == "o":
            for i in range(n):
                cells.add((x + i, y))
            x += n
        elif ch == "$":
            y += n
            x = 0
        elif ch == "!":
            ended = True
        elif ch.isspace():
            if n != 1:
                raise ValueError("RLE has a count followed by white space")
        else:
            raise ValueError(f"RLE has the unexpected character {ch!r}")
    if not ended:
        raise ValueError("RLE does not end with '!'")
    if count:
        raise ValueError("RLE ends with a dangling count")
    for cx, cy in cells:
        if cx >= width or cy >= height:
            raise ValueError(f"RLE cell ({cx}, {cy}) lies outside its header's {width} x {height}")
    return width, height, rule, cells


def write_rle(cells, rule_text, box=None):
    """RLE text of a set of (x, y) cells; returns (text, left, top).

    The RLE's (0, 0) is (left, top): the cells' bounding-box corner, or, when
    box = (left, top, width, height) is given, that box's (which must hold
    every cell). Common practice: runs of b/o, `$` ends a row (counted for
    empty rows), trailing dead cells of a row left out, lines at most 70
    characters."""
    if box is None:
        if not cells:
            return f"x = 0, y = 0, rule = {rule_text}\n!\n", None, None
        left = min(x for x, _ in cells)
        top = min(y for _, y in cells)
        width = max(x for x, _ in cells) - left + 1
        height = max(y for _, y in cells) - top + 1
    else:
        left, top, width, height = box
        for x, y in cells:
            if not (left <= x < left + width and top <= y < top + height):
                raise ValueError(f"cell ({x}, {y}) lies outside the box {box}")
    rows = {}
    for x, y in cells:
        rows.setdefault(y - top, []).append(x - left)
    tokens = []
    prev = 0  # the row the writer stands on
    for r in sorted(rows):
        gap = r - prev
        if gap:
            tokens.append(("" if gap == 1 else str(gap)) + "$")
        prev = r
        row = sorted(rows[r])
        x = 0
        i = 0
        while i < len(row):
            j = i
            while j + 1 < len(row) and row[j + 1] == row[j] + 1:
                j += 1
            dead = row[i] - x
            if dead:
                tokens.append(("" if dead == 1 else str(dead)) + "b")
            run = j - i + 1
            tokens.append(("" if run == 1 else str(run)) + "o")
            x = row[j] + 1
            i = j + 1
    tokens.append("!")
    lines = []
    line = ""
    for token in tokens:
        if len(line) + len(token) > 70:
            lines.append(line)
            line = ""
        line += token
    lines.append(line)
    return f"x = {width}, y = {height}, rule = {rule_text}\n" + "\n".join(lines) + "\n", left, top


# ---------------------------------------------------------------- the plane


class Plane:
    """A finite grid of cells with the plane coordinates of its (0, 0):
    grid[row, col] is the cell at x = col + x0, y = row + y0. Every cell
    outside the grid is in the state `background` (alive only under a B0
    rule). The figures are of the cells that differ from the background."""

    def __init__(self, grid, x0, y0, background=False):
        self.grid = grid
        self.x0 = x0
        self.y0 = y0
        self.background = background

    def differing(self):
        return self.grid ^ self.background

    @staticmethod
    def from_cells(cells, margin):
        if cells:
            left = min(x for x, _ in cells)
            top = min(y for _, y in cells)
            width = max(x for x, _ in cells) - left + 1
            height = max(y for _, y in cells) - top + 1
        else:
            left = top = 0
            width = height = 1
        grid = np.zeros((height + 2 * margin, width + 2 * margin), dtype=bool)
        for x, y in cells:
            grid[y - top + margin, x - left + margin] = True
        return Plane(grid, left - margin, top - margin)

    def population(self):
        """The cells that differ from the background (the live ones when
        it is dead)."""
        return int(np.count_nonzero(self.differing()))

    def bbox(self):
        """(left, top, width, height) of the cells that differ from the
        background, or None."""
        differing = self.differing()
        rows = np.flatnonzero(differing.any(axis=1))
        if rows.size == 0:
            return None
        cols = np.flatnonzero(differing.any(axis=0))
        return (
            int(cols[0]) + self.x0,
            int(rows[0]) + self.y0,
            int(cols[-1] - cols[0]) + 1,
            int(rows[-1] - rows[0]) + 1,
        )

    def cells(self):
        ys, xs = np.nonzero(self.differing())
        return {(int(x) + self.x0, int(y) + self.y0) for x, y in zip(xs, ys)}


def neighbourhood_numbers(grid, boundary):
    """Every cell's neighbourhood number: scipy.ndimage.correlate with
    WEIGHTS (correlation, so the weights land where they stand), cells
    outside the grid dead ("constant") or wrapped round ("wrap")."""
    return scipy.ndimage.correlate(grid.astype(np.int32), WEIGHTS, mode=boundary, cval=0)


def step(plane, rule):
    """One generation, in place. Independent reference: numpy/scipy.
    A rule with B0, or an alive background, goes to step_with_background.

    The neighbourhoods come from scipy's correlation with the weights of
    each neighbour's place. Only the live cells' bounding box grown by one cell can change
    (a rule without B0 never births a cell with no live neighbour), so the
    convolution runs on that window, with zeros outside it: every cell outside
    the window is dead. The grid's padding must keep the window off the edge;
    that is checked, not assumed."""
    if rule.b0 or plane.background:
        step_with_background(plane, rule)
        return
    grid = plane.grid
    rows = np.flatnonzero(grid.any(axis=1))
    if rows.size == 0:
        return
    cols = np.flatnonzero(grid.any(axis=0))
    r0, r1 = rows[0] - 1, rows[-1] + 2
    c0, c1 = cols[0] - 1, cols[-1] + 2
    if r0 < 0 or c0 < 0 or r1 > grid.shape[0] or c1 > grid.shape[1]:
        raise RuntimeError("the pattern reached the edge of the reference grid: the padding is too small")
    window = grid[r0:r1, c0:c1]
    numbers = neighbourhood_numbers(window, "constant")
    new = np.where(window, rule.survive_table[numbers], rule.birth_table[numbers])
    grid[r0:r1, c0:c1] = new


def step_with_background(plane, rule):
    """One generation of the whole grid, every cell outside it in the
    background's state (scipy's "constant" boundary with that value); the
    background then takes the state the rule gives a cell whose eight
    neighbours share it: born with B0 when dead, kept with S8 when alive
    (common practice for B0 rules). Whatever differs from the background
    spreads at most one cell a generation, so the grid's padding keeps it
    off the edge: checked, not assumed, on the grid's outer ring."""
    bg = bool(plane.background)
    numbers = scipy.ndimage.correlate(plane.grid.astype(np.int32), WEIGHTS, mode="constant", cval=int(bg))
    new = np.where(plane.grid, rule.survive_table[numbers], rule.birth_table[numbers])
    background = bool(rule.survive_table[255]) if bg else bool(rule.birth_table[0])
    ring = np.concatenate([new[0, :], new[-1, :], new[:, 0], new[:, -1]])
    if (ring != background).any():
        raise RuntimeError("the pattern reached the edge of the reference grid: the padding is too small")
    plane.grid = new
    plane.background = background


def step_naive(cells, rule):
    """One generation on a set of cells with plain Python dictionaries: a
    second, slower computation that the self-test holds step() against.
    Common practice."""
    near = {(x + dx, y + dy) for x, y in cells for dx in (-1, 0, 1) for dy in (-1, 0, 1)}
    out = set()
    for x, y in near:
        window = np.array([[(x + dx, y + dy) in cells for dx in (-1, 0, 1)] for dy in (-1, 0, 1)])
        if rule.next_state((x, y) in cells, window):
            out.add((x, y))
    return out


# ---------------------------------------------------------------- digest


LEAF_LEVEL = 3


def content_id(data):
    """First 16 bytes of BLAKE3 of the data (the digest definition)."""
    return blake3.blake3(data).digest()[:16]


def leaf_id(bits):
    return content_id(LEAF_LEVEL.to_bytes(4, "little") + bits.to_bytes(8, "little"))


def inner_id(level, nw, ne, sw, se):
    return content_id(level.to_bytes(4, "little") + nw + ne + sw + se)


def empty_ids(up_to):
    """Content ids of the all-dead quads of levels 3..up_to."""
    ids = {LEAF_LEVEL: leaf_id(0)}
    for level in range(LEAF_LEVEL + 1, up_to + 1):
        e = ids[level - 1]
        ids[level] = inner_id(level, e, e, e, e)
    return ids


def canonical_level(bbox):
    """Smallest level L >= 3 whose centred quad [-2^(L-1), 2^(L-1)) in x and
    y holds the bounding box (the digest definition)."""
    level = LEAF_LEVEL
    if bbox is None:
        return level
    left, top, width, height = bbox
    lo = min(left, top)
    hi = max(left + width - 1, top + height - 1)
    while not (-(1 << (level - 1)) <= lo and hi < (1 << (level - 1))):
        level += 1
    return level


def digest(plane):
    """Hex digest of the state, computed from the grid. Independent
    reference: numpy/scipy (numpy packs the leaves, blake3 hashes them)."""
    bbox = plane.bbox()
    level = canonical_level(bbox)
    side = 1 << level
    half = side >> 1
    # The canonical quad's cells as a side x side array; row r is y = r - half.
    quad = np.zeros((side, side), dtype=bool)
    if bbox is not None:
        left, top, width, height = bbox
        src = plane.differing()[top - plane.y0:top - plane.y0 + height, left - plane.x0:left - plane.x0 + width]
        quad[top + half:top + half + height, left + half:left + half + width] = src
    n = side // 8
    # packbits(..., bitorder="little") makes bit x of each byte column x, so
    # byte [y, bx] is row y of the leaf in leaf column bx.
    row_bytes = np.packbits(quad.reshape(side, n, 8), axis=2, bitorder="little").reshape(n, 8, n)
    leaves = np.ascontiguousarray(row_bytes.transpose(0, 2, 1))  # [by, bx, row]
    empty = empty_ids(level)
    live = leaves.any(axis=2)
    ids = [[empty[LEAF_LEVEL]] * n for _ in range(n)]
    for by, bx in zip(*np.nonzero(live)):
        # The leaf's 8 row bytes in order are its u64 little-endian.
        ids[by][bx] = content_id(LEAF_LEVEL.to_bytes(4, "little") + leaves[by, bx].tobytes())
    for lv in range(LEAF_LEVEL + 1, level + 1):
        m = len(ids) // 2
        nxt = [[None] * m for _ in range(m)]
        child_empty = empty[lv - 1]
        for j in range(m):
            for i in range(m):
                nw, ne = ids[2 * j][2 * i], ids[2 * j][2 * i + 1]
                sw, se = ids[2 * j + 1][2 * i], ids[2 * j + 1][2 * i + 1]
                if nw == ne == sw == se == child_empty:
                    nxt[j][i] = empty[lv]
                else:
                    nxt[j][i] = inner_id(lv, nw, ne, sw, se)
        ids = nxt
    assert len(ids) == 1 and len(ids[0]) == 1
    return ids[0][0].hex()


def digest_of_cells(cells):
    return digest(Plane.from_cells(cells, 1))


# ---------------------------------------------------------------- subcommands


def cmd_soup(args):
    rule = Rule(args.rule)
    if not (0.0 <= args.density <= 1.0):
        sys.exit(f"density {args.density} is not in [0, 1]")
    rng = np.random.default_rng(args.seed)
    grid = rng.random((args.size, args.size)) < args.density
    ys, xs = np.nonzero(grid)
    cells = {(int(x), int(y)) for x, y in zip(xs, ys)}
    # The header says N x N and the RLE's (0, 0) is the soup's (0, 0), even
    # when its first rows or columns happen to be empty.
    text, _, _ = write_rle(cells, rule.canonical(), box=(0, 0, args.size, args.size))
    with open(args.out, "w") as f:
        f.write(text)


def record_of(plane, rule):
    """The figures and cells of one state, as compare reads them."""
    bbox = plane.bbox()
    live = plane.cells()
    text, _, _ = write_rle(live, rule.canonical())
    alive = bool(plane.background)
    return {
        "background": "alive" if alive else "dead",
        "population": "infinite" if alive else str(plane.population()),
        "dead_cells": str(plane.population()) if alive else None,
        "bbox": None if bbox is None else {
            "left": str(bbox[0]), "top": str(bbox[1]),
            "width": str(bbox[2]), "height": str(bbox[3]),
        },
        "digest": digest(plane),
        "rle": text,
    }


def run_records(cells, rule, gens):
    """Run from the cells; the record of each listed generation."""
    last = max(gens)
    plane = Plane.from_cells(cells, last + 2)
    wanted = set(gens)
    records = {}
    for g in range(last + 1):
        if g:
            step(plane, rule)
        if g in wanted:
            records[str(g)] = record_of(plane, rule)
    return records


UNIVERSE_RE = re.compile(r"^(torus|bounded) ([0-9]+)x([0-9]+)$")


def step_finite(grid, rule, wrap):
    """One generation of a W x H universe. Independent reference:
    numpy/scipy. scipy's correlate finds the neighbourhoods with the 3x3
    kernel, its "wrap" boundary joining opposite edges (a torus) or its
    zero "fill" boundary keeping every cell outside dead (a bounded
    plane)."""
    numbers = neighbourhood_numbers(grid, "wrap" if wrap else "constant")
    return np.where(grid, rule.survive_table[numbers], rule.birth_table[numbers])


def run_records_finite(cells, rule, gens, universe):
    """Run in a torus or bounded plane whose top-left cell is (0, 0); the
    record of each listed generation, however large: every state is kept,
    by its bytes, until one comes again, and a later generation is the one
    the cycle gives (common practice: a finite system's history ends in a
    cycle; this finds it by a full table of states, not by the engine's
    method)."""
    match = UNIVERSE_RE.match(universe)
    if not match:
        sys.exit(f"universe {universe!r}: write torus WxH or bounded WxH")
    wrap = match.group(1) == "torus"
    width, height = int(match.group(2)), int(match.group(3))
    grid = np.zeros((height, width), dtype=bool)
    for x, y in cells:
        if not (0 <= x < width and 0 <= y < height):
            sys.exit(f"cell ({x}, {y}) lies outside the {universe}")
        grid[y, x] = True
    states = [grid]
    seen = {grid.tobytes(): 0}
    start = period = None
    last = max(gens)
    while len(states) <= last:
        if len(states) > 100_000:
            sys.exit(f"no state came again within 100000 generations in the {universe}")
        grid = step_finite(grid, rule, wrap)
        key = grid.tobytes()
        if key in seen:
            start, period = seen[key], len(states) - seen[key]
            break
        seen[key] = len(states)
        states.append(grid)
    records = {}
    for g in gens:
        at = g if g < len(states) else start + (g - start) % period
        records[str(g)] = record_of(Plane(states[at], 0, 0), rule)
    return records, (start, period)


def parse_gens(text):
    gens = sorted({int(g) for g in text.split(",") if g.strip()})
    if not gens or gens[0] < 0:
        sys.exit(f"generation list {text!r} is empty or negative")
    return gens


def cmd_expect(args):
    rule = Rule(args.rule)
    with open(args.pattern) as f:
        _, _, _, cells = read_rle(f.read())
    gens = parse_gens(args.gens)
    settles_at = period = None
    if args.universe in (None, "plane"):
        records = run_records(cells, rule, gens)
    else:
        records, (settles_at, period) = run_records_finite(cells, rule, gens, args.universe)
    with open(args.out, "w") as f:
        json.dump({"rule": rule.canonical(), "pattern": args.pattern, "generations": records,
                   "settles_at": settles_at, "period": period}, f)
        f.write("\n")


def cells_of_record(record):
    _, _, _, cells = read_rle(record["rle"])
    if record["bbox"] is None:
        return set()
    left, top = int(record["bbox"]["left"]), int(record["bbox"]["top"])
    return {(x + left, y + top) for x, y in cells}


def compare_one(expected, gen, got_rle, got_json):
    """Problems found with one generation's deeptime output (empty: all equal)."""
    problems = []
    record = expected["generations"].get(str(gen))
    if record is None:
        return [f"the expected results have no generation {gen}"]
    with open(got_json) as f:
        text = f.read()
    try:
        report = json.loads(text)
    except json.JSONDecodeError as e:
        return [f"deeptime's --json output is not one JSON object ({e}): {text[:200]!r}"]
    if not isinstance(report, dict):
        return [f"deeptime's --json output is not a JSON object: {text[:200]!r}"]
    for key in ("generation", "population", "bbox", "rule", "digest"):
        if key not in report:
            problems.append(f"deeptime's report has no {key!r}")
    if problems:
        return problems
    if report["generation"] != str(gen):
        problems.append(f"generation: deeptime {report['generation']!r}, asked for {str(gen)!r}")
    if report["rule"] != expected["rule"]:
        problems.append(f"rule: deeptime {report['rule']!r}, reference {expected['rule']!r}")
    if report["population"] != record["population"]:
        problems.append(f"population: deeptime {report['population']!r}, reference {record['population']!r}")
    if report.get("background") != record["background"]:
        problems.append(f"background: deeptime {report.get('background')!r}, reference {record['background']!r}")
    if report.get("dead_cells") != record["dead_cells"]:
        problems.append(f"dead cells: deeptime {report.get('dead_cells')!r}, reference {record['dead_cells']!r}")
    if report["bbox"] != record["bbox"]:
        problems.append(f"bbox: deeptime {report['bbox']!r}, reference {record['bbox']!r}")
    if report["digest"] != record["digest"]:
        problems.append(f"digest: deeptime {report['digest']!r}, reference {record['digest']!r}")

    with open(got_rle) as f:
        rle_text = f.read()
    try:
        width, height, rle_rule, got_local = read_rle(rle_text)
    except ValueError as e:
        problems.append(f"deeptime's RLE does not parse with the reference reader: {e}")
        return problems
    # An alive background is named in the text (deeptime's own comment).
    says_alive = any(line.startswith("#background alive") for line in rle_text.splitlines())
    if says_alive != (record["background"] == "alive"):
        problems.append(f"RLE says background alive: {says_alive}, reference background {record['background']}")
    if rle_rule is not None and rle_rule != expected["rule"]:
        problems.append(f"RLE header rule: deeptime {rle_rule!r}, reference {expected['rule']!r}")
    bbox = report["bbox"]
    if bbox is None:
        if got_local or (width, height) != (0, 0):
            problems.append(f"deeptime reports no bbox but its RLE is {width} x {height} with {len(got_local)} cells")
        got = set()
    else:
        if (str(width), str(height)) != (bbox["width"], bbox["height"]):
            problems.append(f"RLE header {width} x {height} differs from deeptime's bbox {bbox['width']} x {bbox['height']}")
        left, top = int(bbox["left"]), int(bbox["top"])
        got = {(x + left, y + top) for x, y in got_local}
    want = cells_of_record(record)
    if got != want:
        only_ref = sorted(want - got, key=lambda c: (c[1], c[0]))
        only_got = sorted(got - want, key=lambda c: (c[1], c[0]))
        problems.append(
            f"cells differ: reference {len(want)} live, deeptime {len(got)} live; "
            f"{len(only_ref)} only in the reference, first (x, y): {only_ref[:10]}; "
            f"{len(only_got)} only in deeptime, first (x, y): {only_got[:10]}"
        )
    return problems


def cmd_compare(args):
    if not (len(args.gen) == len(args.got) == len(args.got_json)):
        sys.exit("compare needs as many --got and --got-json as --gen")
    with open(args.expected) as f:
        expected = json.load(f)
    failed = 0
    for gen, got_rle, got_json in zip(args.gen, args.got, args.got_json):
        problems = compare_one(expected, gen, got_rle, got_json)
        if problems:
            failed += 1
            print(f"MISMATCH rule {expected['rule']} pattern {expected['pattern']} generation {gen}:")
            for p in problems:
                print(f"  - {p}")
    print(f"compare: {len(args.gen) - failed} generations equal, {failed} differ "
          f"(rule {expected['rule']}, pattern {expected['pattern']})")
    sys.exit(1 if failed else 0)


# ---------------------------------------------------------------- census


# B3/S23 objects with names in the trade, one phase each (from memory; the
# same list the trade's pattern pages give: LifeWiki, each object's page).
NAMED_OBJECTS = {
    "block": ["OO", "OO"],
    "beehive": [".OO.", "O..O", ".OO."],
    "loaf": [".OO.", "O..O", ".O.O", "..O."],
    "boat": ["OO.", "O.O", ".O."],
    "ship": ["OO.", "O.O", ".OO"],
    "tub": [".O.", "O.O", ".O."],
    "pond": [".OO.", "O..O", "O..O", ".OO."],
    "long boat": ["OO..", "O.O.", ".O.O", "..O."],
    "barge": [".O..", "O.O.", ".O.O", "..O."],
    "mango": [".OO..", "O..O.", ".O..O", "..OO."],
    "eater": ["OO..", "O.O.", "..O.", "..OO"],
    "blinker": ["OOO"],
    "toad": [".OOO", "OOO."],
    "beacon": ["OO..", "OO..", "..OO", "..OO"],
    "pulsar": ["..OOO...OOO..", ".............", "O....O.O....O", "O....O.O....O",
               "O....O.O....O", "..OOO...OOO..", ".............", "..OOO...OOO..",
               "O....O.O....O", "O....O.O....O", "O....O.O....O", ".............",
               "..OOO...OOO.."],
    "pentadecathlon": ["..O....O..", "OO.OOOO.OO", "..O....O.."],
    "glider": [".O.", "..O", "OOO"],
    "lightweight spaceship": [".O..O", "O....", "O...O", "OOOO."],
    "middleweight spaceship": ["...O..", ".O...O", "O.....", "O....O", "OOOOO."],
    "heavyweight spaceship": ["...OO..", ".O....O", "O......", "O.....O", "OOOOOO."],
}

MAX_ALONE = 600


def cells_of_rows(rows):
    return {(x, y) for y, row in enumerate(rows) for x, c in enumerate(row) if c == "O"}


def array_of(cells):
    """The cells as a bool array of their bounding box, and its corner."""
    left = min(x for x, _ in cells)
    top = min(y for _, y in cells)
    width = max(x for x, _ in cells) - left + 1
    height = max(y for _, y in cells) - top + 1
    grid = np.zeros((height, width), dtype=bool)
    for x, y in cells:
        grid[y - top, x - left] = True
    return grid, (left, top)


def shape_digest(cells):
    """Smallest digest of the eight orientations, each with its bounding
    box's corner at (0, 0) (README, "Shape digest"); numpy turns them."""
    grid, _ = array_of(cells)
    best = None
    for flipped in (grid, np.fliplr(grid)):
        for k in range(4):
            turned = np.rot90(flipped, k)
            ys, xs = np.nonzero(turned)
            d = digest_of_cells({(int(x), int(y)) for x, y in zip(xs, ys)})
            if best is None or d < best:
                best = d
    return best


def run_alone(cells, rule):
    """(period, dx, dy, phases) of cells run alone until they repeat up to
    a shift, or None. Numpy/scipy steps on a padded grid."""
    start, corner = array_of(cells)
    plane = Plane.from_cells(cells, MAX_ALONE + 2)
    phases = [set(cells)]
    for t in range(1, MAX_ALONE + 1):
        step(plane, rule)
        now = plane.cells()
        if not now:
            return None
        grid, at = array_of(now)
        if grid.shape == start.shape and np.array_equal(grid, start):
            return t, at[0] - corner[0], at[1] - corner[1], phases
        phases.append(now)
    return None


def object_name(cells, rule, named):
    """(name, kind, period, dx, dy) of an object; None if it does not repeat."""
    found = run_alone(cells, rule)
    if found is None:
        return None
    period, dx, dy, phases = found
    ident = min(shape_digest(phase) for phase in phases)
    if dx or dy:
        kind = "spaceship"
    elif period == 1:
        kind = "still-life"
    else:
        kind = "oscillator"
    smallest = min(len(phase) for phase in phases)
    if ident in named:
        name = named[ident]
    elif kind == "still-life":
        name = f"{kind}-{smallest}-{ident[:8]}"
    else:
        name = f"{kind}-p{period}-{smallest}-{ident[:8]}"
    return name, kind, period, dx, dy, phases


def direction(dx, dy):
    """Compass direction, y down (common practice: north is up)."""
    if dx == 0 and dy == 0:
        return None
    v = "north" if dy < 0 else "south" if dy > 0 else ""
    h = "east" if dx > 0 else "west" if dx < 0 else ""
    if dx == 0:
        return v
    if dy == 0:
        return h
    if abs(dx) != abs(dy):
        return None
    return f"{v}-{h}"


def census(cells, rule):
    """Take a settled state apart: 8-connected components from
    scipy.ndimage.label, each run alone; components that do not repeat are
    joined to the components within two cells (a 5x5 dilation); then the
    whole is run for the common period and compared with the sum of the
    objects run alone, joining the objects near any cell where they differ.
    Independent reference: numpy/scipy."""
    named = {}
    if rule.canonical() == "B3/S23":
        for name, rows in NAMED_OBJECTS.items():
            found = object_name(cells_of_rows(rows), rule, {})
            assert found is not None, name
            named[min(shape_digest(p) for p in found[5])] = name
    if not cells:
        return []
    plane = Plane.from_cells(cells, 3)
    labels, count = scipy.ndimage.label(plane.grid, structure=np.ones((3, 3), dtype=int))
    # groups: label -> set of cells (plane coordinates)
    groups = {}
    ys, xs = np.nonzero(labels)
    for x, y in zip(xs, ys):
        groups.setdefault(int(labels[y, x]), set()).add((int(x) + plane.x0, int(y) + plane.y0))

    def join(ids):
        ids = sorted(set(ids))
        keep = ids[0]
        for other in ids[1:]:
            groups[keep] |= groups.pop(other)
            labels[labels == other] = keep

    ball = np.ones((5, 5), dtype=bool)
    while True:
        classified = {g: object_name(c, rule, named) for g, c in groups.items()}
        changing = [g for g, found in classified.items() if found is None]
        if changing:
            joined = False
            for g in changing:
                if g not in groups:
                    continue
                near = scipy.ndimage.binary_dilation(labels == g, structure=ball)
                ids = set(np.unique(labels[near])) - {0}
                if len(ids) > 1:
                    join(ids)
                    joined = True
            if not joined:
                raise RuntimeError("the state is not settled: an object keeps changing")
            continue
        # The whole against the sum of its objects over the common period.
        period = 1
        for found in classified.values():
            period = period * found[2] // np.gcd(period, found[2])
        whole = Plane.from_cells(cells, period + 3)
        mismatch = set()
        for t in range(1, period + 1):
            step(whole, rule)
            total = set()
            for g, found in classified.items():
                _, _, p, dx, dy, phases = found
                turns, phase = divmod(t, p)
                total |= {(x + turns * dx, y + turns * dy) for x, y in phases[phase]}
            mismatch = whole.cells() ^ total
            if mismatch:
                break
        if not mismatch:
            break
        ids = set()
        for x, y in mismatch:
            for g, c in groups.items():
                if any(abs(x - cx) <= 3 and abs(y - cy) <= 3 for cx, cy in c):
                    ids.add(g)
        if len(ids) < 2:
            raise RuntimeError("the state is not settled: the whole differs from its objects")
        join(ids)
    counts = {}
    for found in classified.values():
        name, kind, period, dx, dy, _ = found
        key = (name, kind, direction(dx, dy))
        counts[key] = counts.get(key, 0) + 1
    return [{"name": n, "kind": k, "direction": d, "count": c} for (n, k, d), c in sorted(counts.items(), key=str)]


def cmd_census(args):
    with open(args.pattern) as f:
        _, _, rule_text, cells = read_rle(f.read())
    rule = Rule(args.rule or rule_text or "B3/S23")
    json.dump({"population": len(cells), "census": census(cells, rule)}, sys.stdout)
    sys.stdout.write("\n")


def cmd_selftest(_args):
    checks = 0

    def check(cond, what):
        nonlocal checks
        checks += 1
        if not cond:
            print(f"SELFTEST FAILED: {what}")
            sys.exit(1)

    # Bounded universes, reasoned by hand (common practice). A blinker lying
    # across the seam of a 5x5 torus (x = 4, 0, 1 in row 0) turns upright
    # in column 0 (rows 4, 0, 1).
    life = Rule("B3/S23")
    grid = np.zeros((5, 5), dtype=bool)
    grid[0, [4, 0, 1]] = True
    upright = step_finite(grid, life, wrap=True)
    check({(int(x), int(y)) for y, x in zip(*np.nonzero(upright))} == {(0, 4), (0, 0), (0, 1)},
          "a blinker across a torus's seam")
    # The same row of three on the bottom edge of a bounded 3x2 plane: the
    # middle keeps two neighbours, the cell above it is born, nothing below.
    grid = np.zeros((2, 3), dtype=bool)
    grid[1, :] = True
    after = step_finite(grid, life, wrap=False)
    check({(int(x), int(y)) for y, x in zip(*np.nonzero(after))} == {(1, 0), (1, 1)},
          "a row of three on a bounded plane's edge")

    # Digest, from the definition worked by hand.
    # Empty state: the level-3 leaf with no cells, 12 bytes 03 00 00 00 and
    # eight zero bytes (digest definition).
    empty = blake3.blake3(bytes([3, 0, 0, 0]) + bytes(8)).digest()[:16].hex()
    check(digest_of_cells(set()) == empty, "empty digest is BLAKE3 of the empty leaf")
    # One cell at (0, 0): the level-3 quad covers [-4, 4), so the cell is at
    # column 4, row 4 of the leaf: bit 36, which is bit 4 of byte 4 (0x10).
    one = blake3.blake3(bytes([3, 0, 0, 0, 0, 0, 0, 0, 0x10, 0, 0, 0])).digest()[:16].hex()
    check(digest_of_cells({(0, 0)}) == one, "digest of one cell at (0, 0)")
    # Cell (-4, -4) is the leaf's own (0, 0): bit 0, byte 0 = 0x01.
    corner = blake3.blake3(bytes([3, 0, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0])).digest()[:16].hex()
    check(digest_of_cells({(-4, -4)}) == corner, "digest of one cell at (-4, -4)")
    # Cell (3, 3) is the leaf's (7, 7): bit 63, byte 7 = 0x80.
    last = blake3.blake3(bytes([3, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0x80])).digest()[:16].hex()
    check(digest_of_cells({(3, 3)}) == last, "digest of one cell at (3, 3)")
    # Cell (4, 0) needs level 4, [-8, 8); it lies in the se child ([0, 8) in
    # x and y) at the child's (4, 0): bit 4 of byte 0 (0x10).
    e3 = blake3.blake3(bytes([3, 0, 0, 0]) + bytes(8)).digest()[:16]
    se = blake3.blake3(bytes([3, 0, 0, 0, 0x10, 0, 0, 0, 0, 0, 0, 0])).digest()[:16]
    lvl4 = blake3.blake3(bytes([4, 0, 0, 0]) + e3 + e3 + e3 + se).digest()[:16].hex()
    check(digest_of_cells({(4, 0)}) == lvl4, "digest of one cell at (4, 0) (level 4, se child)")
    # Cell (-5, 0) also needs level 4 and lies in the sw child ([-8, 0) in x,
    # [0, 8) in y) at the child's (3, 0): bit 3 of byte 0 (0x08).
    sw = blake3.blake3(bytes([3, 0, 0, 0, 0x08, 0, 0, 0, 0, 0, 0, 0])).digest()[:16]
    lvl4b = blake3.blake3(bytes([4, 0, 0, 0]) + e3 + e3 + sw + e3).digest()[:16].hex()
    check(digest_of_cells({(-5, 0)}) == lvl4b, "digest of one cell at (-5, 0) (level 4, sw child)")
    # Cells (0, -5) (ne child, its (0, 3): byte 3 = 0x01) and (-1, -1) (nw
    # child, its (7, 7): byte 7 = 0x80) together.
    ne = blake3.blake3(bytes([3, 0, 0, 0, 0, 0, 0, 0x01, 0, 0, 0, 0])).digest()[:16]
    nw = blake3.blake3(bytes([3, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0x80])).digest()[:16]
    lvl4c = blake3.blake3(bytes([4, 0, 0, 0]) + nw + ne + e3 + e3).digest()[:16].hex()
    check(digest_of_cells({(0, -5), (-1, -1)}) == lvl4c, "digest of cells in the nw and ne children")
    # The digest depends only on the cells, not on where the grid lies.
    cells = {(10, -3), (11, -3), (-20, 7), (0, 0)}
    check(digest(Plane.from_cells(cells, 1)) == digest(Plane.from_cells(cells, 37)), "digest is independent of padding")
    # 8 = 2^3 wide at x = 4..11 needs level 5 ([-16, 16)); x = 16 needs level 6.
    check(canonical_level((4, 0, 8, 1)) == 5, "canonical level of x in [4, 12)")
    check(canonical_level((16, 0, 1, 1)) == 6, "canonical level of x = 16")
    check(canonical_level((-16, 0, 1, 1)) == 5, "canonical level of x = -16")
    check(canonical_level((-17, 0, 1, 1)) == 6, "canonical level of x = -17")

    # RLE: the glider reads as five cells (common practice), and writing then
    # reading gives back the same cells.
    w, h, r, glider = read_rle("x = 3, y = 3\nbob$2bo$3o!\n")
    check((w, h, r) == (3, 3, None) and glider == {(1, 0), (2, 1), (0, 2), (1, 2), (2, 2)}, "glider RLE reads")
    rng = random.Random(7)
    for _ in range(20):
        cells = {(rng.randrange(-40, 90), rng.randrange(-30, 30)) for _ in range(rng.randrange(1, 300))}
        text, left, top = write_rle(cells, "B3/S23")
        _, _, _, back = read_rle(text)
        check({(x + left, y + top) for x, y in back} == cells, "RLE write/read round trip")
        check(all(len(line) <= 70 for line in text.splitlines()[1:]), "RLE lines at most 70 characters")
    _, _, _, gaps = read_rle("x = 5, y = 6, rule = B3/S23\no3$4bo$o2b2o!")
    check(gaps == {(0, 0), (4, 3), (0, 4), (3, 4), (4, 4)}, "RLE with counted empty rows")

    life = Rule("B3/S23")
    check(life.canonical() == "B3/S23" and Rule("B63/S32").canonical() == "B36/S23", "rule canonical text")
    # Glider: after 4 generations the same shape moved by (1, 1) (common practice).
    plane = Plane.from_cells(glider, 10)
    for _ in range(4):
        step(plane, life)
    check(plane.cells() == {(x + 1, y + 1) for x, y in glider}, "glider moves (1, 1) in 4 generations")
    # Blinker has period 2; block is still (common practice).
    blinker = {(0, 1), (1, 1), (2, 1)}
    plane = Plane.from_cells(blinker, 4)
    step(plane, life)
    check(plane.cells() == {(1, 0), (1, 1), (1, 2)}, "blinker turns")
    step(plane, life)
    check(plane.cells() == blinker, "blinker has period 2")
    block = {(0, 0), (1, 0), (0, 1), (1, 1)}
    plane = Plane.from_cells(block, 4)
    step(plane, life)
    check(plane.cells() == block, "block is still")
    # B2/S: two cells side by side give birth to the two rows beside them
    # and die (from memory: each of the four cells above and below has two
    # live neighbours; the two ends have one).
    plane = Plane.from_cells({(0, 0), (1, 0)}, 4)
    step(plane, Rule("B2/S"))
    check(plane.cells() == {(0, -1), (1, -1), (0, 1), (1, 1)}, "B2/S domino")
    # S0 keeps a lone cell (from memory: it has 0 neighbours).
    plane = Plane.from_cells({(5, 5)}, 4)
    step(plane, Rule("B3/S012345678"))
    check(plane.cells() == {(5, 5)}, "S0 keeps a lone cell")

    # Hensel letters. 51 arrangements from 0 to 8 neighbours, and every
    # neighbourhood of 1..7 neighbours in exactly one letter (LifeWiki,
    # "Isotropic non-totalistic rule": the table's size, from memory).
    check(sum(max(1, len(letters_of(c))) for c in range(9)) == 51, "51 arrangements")
    for count in range(1, 8):
        named = [i for l in letters_of(count) for i in LETTER_CLASSES[(count, l)]]
        check(sorted(named) == sorted(neighbourhoods_with(count)), f"letters of {count} cover it once")
    # LifeWiki, same page: 2i is a blinker's centre; 4q a middle cell of the
    # beacon's dense phase; B1e2ak3inqy4ny5e/S is B1/S on the four
    # orthogonal neighbours.
    blinker_centre = picture_array(".x./.../.x.")
    check(window_index(blinker_centre) in LETTER_CLASSES[(2, "i")], "2i is a blinker's centre")
    beacon_cell = picture_array("xx./x../..x")
    check(window_index(beacon_cell) in LETTER_CLASSES[(4, "q")], "4q is the beacon's middle cell")
    emulation = Rule("B1e2ak3inqy4ny5e/S")
    orthogonal = [(0, 1), (1, 0), (1, 2), (2, 1)]
    for number in range(256):
        window = np.array([[number & WEIGHTS[r, c] != 0 if (r, c) != (1, 1) else False
                            for c in range(3)] for r in range(3)])
        one = sum(window[r, c] for r, c in orthogonal) == 1
        check(emulation.next_state(False, window) == one, f"von Neumann emulation, {number}")
    # The same identity by stepping: B1/S on the four orthogonal neighbours,
    # counted with a plus-shaped kernel, against the Hensel rule for 30
    # generations of a soup (LifeWiki, same page; independent reference:
    # numpy/scipy).
    plus = np.array([[0, 1, 0], [1, 0, 1], [0, 1, 0]], dtype=np.int32)
    soup_rng = random.Random(11)
    soup = {(x, y) for x in range(12) for y in range(12) if soup_rng.random() < 0.3}
    plane = Plane.from_cells(soup, 40)
    grid = plane.grid.copy()
    for g in range(30):
        step(plane, emulation)
        orthogonal_counts = scipy.ndimage.correlate(grid.astype(np.int32), plus, mode="constant", cval=0)
        grid = ~grid & (orthogonal_counts == 1)
        check(np.array_equal(plane.grid, grid), f"B1/S on the orthogonal neighbours, generation {g + 1}")
    check(Rule("B2-a/S12").canonical() == "B2-a/S12", "canonical B2-a/S12")
    check(Rule("B3/S2-i34q").canonical() == "B3/S2-i34q", "canonical tlife")
    check(Rule("B3aceijknqry/S2aceikn3").canonical() == "B3/S23", "every letter is the whole count")
    check(Rule("B3S23").canonical() == "B3/S23", "slashless form")

    # The scipy step against the plain-Python step on random soups, every
    # rule the whole-system test uses and a few more.
    for text in ("B3/S23", "B36/S23", "B3678/S34678", "B2/S", "B3/S012345678",
                 "B1357/S02468", "B1/S1", "B345/S5", "B25678/S0135",
                 "B2-a/S12", "B3/S2-i34q", "B1e2ak3inqy4ny5e/S", "B2e3-ir4t/S1c23-q4w"):
        rule = Rule(text)
        soup = {(x, y) for x in range(16) for y in range(16) if rng.random() < 0.4}
        plane = Plane.from_cells(soup, 25)
        naive = soup
        for g in range(20):
            step(plane, rule)
            naive = step_naive(naive, rule)
            check(plane.cells() == naive, f"scipy step equals plain step, rule {text}, generation {g + 1}")
            bbox = plane.bbox()
            if naive:
                xs = [x for x, _ in naive]
                ys = [y for _, y in naive]
                want = (min(xs), min(ys), max(xs) - min(xs) + 1, max(ys) - min(ys) + 1)
            else:
                want = None
            check(bbox == want, f"bbox, rule {text}, generation {g + 1}")
            check(plane.population() == len(naive), f"population, rule {text}, generation {g + 1}")

    # B0. LifeWiki, "Black/white reversal" (from memory): B0123478/S01234678
    # is Life with the two states swapped. A soup's complement on an alive
    # background, stepped by it, stays the complement of the soup stepped
    # by Life (on a dead background); the background stays alive (S8).
    reversal = Rule("B0123478/S01234678")
    life = Rule("B3/S23")
    soup = {(x, y) for x in range(14) for y in range(14) if rng.random() < 0.35}
    plane = Plane.from_cells(soup, 30)
    swapped = Plane(~plane.grid, plane.x0, plane.y0, background=True)
    for g in range(25):
        step(plane, life)
        step(swapped, reversal)
        check(swapped.background, f"the reversal keeps an alive background, generation {g + 1}")
        check(np.array_equal(swapped.grid, ~plane.grid), f"reversal of Life, generation {g + 1}")
        check(swapped.cells() == plane.cells(), f"reversal: the dead cells are Life's live ones, {g + 1}")
    # B0 without S8 flips the background every generation; with S8 it
    # stays alive from generation 1 (common practice). On an empty plane
    # nothing differs from it.
    for text, flips in (("B0/S", True), ("B0/S8", False), ("B03/S23", True)):
        plane = Plane.from_cells(set(), 3)
        for g in range(1, 7):
            step(plane, Rule(text))
            want = (g % 2 == 1) if flips else True
            check(plane.background == want, f"{text}: background at generation {g}")
            check(plane.population() == 0, f"{text}: nothing differs on an empty plane, {g}")
    # Every B0 step against a plain-Python step of the true cells of the
    # grid, cell by cell, each neighbour outside the grid in the
    # background's state (common practice).
    def step_grid_naive(grid, background, rule):
        height, width = grid.shape

        def at(x, y):
            return grid[y, x] if 0 <= x < width and 0 <= y < height else background
        new = np.array([[rule.next_state(at(x, y), np.array([[at(x + dx, y + dy) for dx in (-1, 0, 1)]
                                                             for dy in (-1, 0, 1)]))
                         for x in range(width)] for y in range(height)])
        return new, rule.next_state(background, np.full((3, 3), background))

    for text in ("B03/S23", "B0124/S1357", "B0123478/S34678", "B02a3-k/S2-i3"):
        rule = Rule(text)
        soup = {(x, y) for x in range(10) for y in range(10) if rng.random() < 0.4}
        plane = Plane.from_cells(soup, 12)
        grid, background = plane.grid.copy(), False
        for g in range(8):
            step(plane, rule)
            grid, background = step_grid_naive(grid, background, rule)
            check(plane.background == background, f"B0 background, rule {text}, generation {g + 1}")
            check(np.array_equal(plane.grid, grid), f"B0 step equals plain step, rule {text}, generation {g + 1}")
    print(f"selftest: {checks} passed, 0 failed")


def main():
    parser = argparse.ArgumentParser(description="Independent reference simulator for deeptime's tests")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("soup", help="write a seeded random soup as RLE")
    p.add_argument("--rule", required=True)
    p.add_argument("--seed", type=int, required=True)
    p.add_argument("--size", type=int, required=True)
    p.add_argument("--density", type=float, required=True)
    p.add_argument("--out", required=True)
    p.set_defaults(func=cmd_soup)

    p = sub.add_parser("expect", help="run a pattern and record the listed generations")
    p.add_argument("--pattern", required=True)
    p.add_argument("--rule", required=True)
    p.add_argument("--gens", required=True, help="comma-separated generations, e.g. 0,1,2,100")
    p.add_argument("--out", required=True)
    p.add_argument("--universe", help="plane (the default), torus WxH or bounded WxH")
    p.set_defaults(func=cmd_expect)

    p = sub.add_parser("compare", help="compare deeptime's output with the expected records")
    p.add_argument("--expected", required=True)
    p.add_argument("--gen", type=int, action="append", required=True,
                   help="a generation; repeat together with --got and --got-json")
    p.add_argument("--got", action="append", required=True, help="deeptime's --out RLE")
    p.add_argument("--got-json", action="append", required=True, help="deeptime's --json output")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("census", help="take a settled state apart into named objects")
    p.add_argument("--pattern", required=True)
    p.add_argument("--rule", help="default: the pattern's header, else B3/S23")
    p.set_defaults(func=cmd_census)

    p = sub.add_parser("selftest", help="check the reference itself on cases reasoned by hand")
    p.set_defaults(func=cmd_selftest)

    args = parser.parse_args()
    args.func(args)


if __name__ == "__main__":
    main()
