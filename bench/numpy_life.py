"""The straightforward numpy/scipy way to run a Life-like rule on a grid:
what a scientist would write without a dedicated engine. `deeptime bench`
times it against the direct stepper on the same soup (it writes the soup,
runs this script, and compares populations).

usage: numpy_life.py PATTERN.rle RULE GENERATIONS
prints one JSON object: population, seconds (of the stepping loop only),
cells (the array's area, simulated each generation).
"""

import json
import re
import sys
import time

import numpy as np
from scipy.signal import convolve2d


def read_rle(text):
    """Live cells of a two-state RLE pattern, top-left at (0, 0)."""
    lines = [line for line in text.splitlines() if not line.startswith("#")]
    body = "".join(line for line in lines if not line.lstrip().startswith("x"))
    cells, x, y = [], 0, 0
    for count, tag in re.findall(r"(\d*)([bo$!])", body):
        count = int(count) if count else 1
        if tag == "b":
            x += count
        elif tag == "o":
            cells.extend((x + i, y) for i in range(count))
            x += count
        elif tag == "$":
            y += count
            x = 0
        else:
            break
    return cells


def parse_rule(rule):
    birth, survive = rule.upper().split("/")
    return [int(d) for d in birth[1:]], [int(d) for d in survive[1:]]


def main():
    path, rule, generations = sys.argv[1], sys.argv[2], int(sys.argv[3])
    with open(path) as handle:
        cells = read_rle(handle.read())
    birth, survive = parse_rule(rule)
    width = max(x for x, _ in cells) + 1
    height = max(y for _, y in cells) + 1
    margin = generations + 1  # cells spread at most one per generation
    grid = np.zeros((height + 2 * margin, width + 2 * margin), dtype=np.uint8)
    for x, y in cells:
        grid[y + margin, x + margin] = 1
    kernel = np.ones((3, 3), dtype=np.uint8)
    kernel[1, 1] = 0
    started = time.perf_counter()
    for _ in range(generations):
        neighbours = convolve2d(grid, kernel, mode="same")
        born = np.isin(neighbours, birth) & (grid == 0)
        stays = np.isin(neighbours, survive) & (grid == 1)
        grid = (born | stays).astype(np.uint8)
    seconds = time.perf_counter() - started
    print(json.dumps({
        "population": int(grid.sum()),
        "seconds": seconds,
        "cells": int(grid.size),
    }))


if __name__ == "__main__":
    main()
