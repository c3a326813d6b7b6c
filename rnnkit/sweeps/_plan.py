"""Plan a sweep: a base Config and a search space in, the list of Configs to run out.

``space`` maps Config field names to the values to try. The grid takes every
combination; the random strategy draws ``n_samples`` settings, and besides
lists it takes ranges: ``{"low": 1e-4, "high": 1e-1, "log": True}`` for a
number, ``{"low": 8, "high": 64, "int": True}`` for a whole number. Each
setting is repeated over the seeds. Every planned Config is built (and so
checked) here, before anything runs.
"""
from __future__ import annotations

import itertools
import math
from typing import Dict, List, Optional, Sequence, Union

import numpy as np

from ..data._config import Config, config_fields

STRATEGIES = ("grid", "random")
# A range for strategy="random", in our own words:
#   {"from": 1e-4, "to": 0.1, "spacing": "log"}   draws spread evenly on a log scale
#   {"from": 8, "to": 64, "whole": true}          whole numbers from 8 to 64, both included
_RANGE_KEYS = {"from", "to", "spacing", "whole"}
SPACINGS = ("even", "log")
MAX_SEEDS = 1000  # seeds per setting (a count or a list)
MAX_SAMPLES = 100_000  # random settings to draw


def _plain(v):
    """numpy scalars -> Python scalars (Config checks for int/float, JSON needs them)."""
    return v.item() if isinstance(v, np.generic) else v


def _check_range(name: str, r: dict) -> dict:
    example = "{'from': 1e-4, 'to': 0.1, 'spacing': 'log'}"
    unknown = sorted(set(r) - _RANGE_KEYS)
    if unknown or "from" not in r or "to" not in r:
        raise ValueError(f"space[{name!r}] (={r!r}) is not a range: a range has keys 'from' and 'to', "
                         f"and optionally 'spacing' ({' or '.join(repr(x) for x in SPACINGS)}) and "
                         f"'whole' (true for whole numbers), e.g. {example}")
    lo, hi = _plain(r["from"]), _plain(r["to"])
    spacing, whole = r.get("spacing", "even"), r.get("whole", False)
    for k, v in (("from", lo), ("to", hi)):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ValueError(f"space[{name!r}][{k!r}] (={v!r}) must be a finite number")
    if spacing not in SPACINGS:
        raise ValueError(f"space[{name!r}]['spacing'] (={spacing!r}) must be one of {SPACINGS}")
    if not isinstance(whole, bool):
        raise ValueError(f"space[{name!r}]['whole'] (={whole!r}) must be true or false")
    if not lo < hi:
        raise ValueError(f"space[{name!r}]: 'from' (={lo!r}) must be below 'to' (={hi!r})")
    if spacing == "log" and lo <= 0:
        raise ValueError(f"space[{name!r}]: spacing 'log' needs 'from' > 0 (got {lo!r})")
    if whole and (lo != int(lo) or hi != int(hi)):
        raise ValueError(f"space[{name!r}]: a whole-number range needs whole 'from' and 'to' "
                         f"(got {lo!r}, {hi!r})")
    return {"from": lo, "to": hi, "log": spacing == "log", "whole": whole}


def check_space(space, strategy: str) -> Dict[str, Union[list, dict]]:
    """The space with lists copied and ranges checked; bad names and values refused."""
    if not isinstance(space, dict) or not space:
        raise TypeError(f"`space` (={space!r}) must be a non-empty dict of Config field -> list of "
                        "values, e.g. {'hidden': [8, 16], 'activation': ['tanh', 'relu']}")
    known = config_fields()
    out = {}
    for name, values in space.items():
        if name not in known:
            raise ValueError(f"space names {name!r}, which is not a Config field; the fields are "
                             f"{list(known)}")
        if name == "seed":
            raise ValueError("space names 'seed'; give seeds with the `seeds` argument "
                             "(a count, or a list of seeds) instead")
        if isinstance(values, dict):
            if strategy != "random":
                raise ValueError(f"space[{name!r}] is a range; ranges need strategy='random' "
                                 "(the grid needs a list of values)")
            out[name] = _check_range(name, values)
        elif isinstance(values, (list, tuple, np.ndarray, range)) and len(values) > 0:
            out[name] = [_plain(v) for v in values]
        else:
            raise TypeError(f"space[{name!r}] (={values!r}) must be a non-empty list of values"
                            + (" or a range dict" if strategy == "random" else ""))
    return out


def seed_list(config: Config, seeds) -> List[int]:
    """`seeds` as a list: a count n gives config.seed + 0..n-1; a list is taken as given."""
    if isinstance(seeds, (int, np.integer)) and not isinstance(seeds, bool):
        if not 1 <= seeds <= MAX_SEEDS:
            raise ValueError(f"`seeds` (={seeds!r}) must be from 1 to {MAX_SEEDS} (the number of seeds "
                             "per setting) or a list of seeds")
        return [config.seed + k for k in range(int(seeds))]
    if isinstance(seeds, (list, tuple, np.ndarray, range)) and len(seeds) > 0:
        if len(seeds) > MAX_SEEDS:
            raise ValueError(f"`seeds` lists {len(seeds)} seeds; at most {MAX_SEEDS} are allowed")
        out = [_plain(s) for s in seeds]
        if len(set(out)) != len(out):
            raise ValueError(f"`seeds` (={out!r}) repeats a seed; give distinct seeds")
        return out
    raise TypeError(f"`seeds` (={seeds!r}) must be a number of seeds (int >= 1) or a non-empty list")


def _draw(rng: np.random.Generator, values):
    if isinstance(values, list):
        return values[int(rng.integers(len(values)))]
    lo, hi = values["from"], values["to"]
    if values["log"]:
        x = math.exp(rng.uniform(math.log(lo), math.log(hi)))
        return int(min(max(round(x), lo), hi)) if values["whole"] else float(min(max(x, lo), hi))
    if values["whole"]:
        return int(rng.integers(int(lo), int(hi) + 1))
    return float(rng.uniform(lo, hi))


def settings(space: dict, strategy: str, n_samples: Optional[int], seed: int) -> List[dict]:
    """The settings (field -> value dicts) to try, before seeds."""
    names = list(space)
    if strategy == "grid":
        if n_samples is not None:
            raise ValueError(f"`n_samples` (={n_samples!r}) is for strategy='random'; the grid "
                             "runs every combination (leave n_samples None)")
        return [dict(zip(names, combo)) for combo in itertools.product(*space.values())]
    if (isinstance(n_samples, bool) or not isinstance(n_samples, (int, np.integer))
            or not 1 <= n_samples <= MAX_SAMPLES):
        raise ValueError(f"`n_samples` (={n_samples!r}) must be a whole number from 1 to {MAX_SAMPLES} "
                         "with strategy='random'")
    rng = np.random.default_rng(seed)
    if all(isinstance(v, list) for v in space.values()):
        # Only lists: draw distinct grid points, so no setting is run twice.
        sizes = [len(v) for v in space.values()]
        total = math.prod(sizes)
        if n_samples > total:
            raise ValueError(f"`n_samples` (={n_samples}) is more than the {total} distinct settings "
                             "of `space`; lower n_samples or use strategy='grid'")
        picks = rng.choice(total, size=int(n_samples), replace=False)
        return [dict(zip(names, (v[i] for v, i in zip(space.values(), np.unravel_index(p, sizes)))))
                for p in picks]
    return [{n: _draw(rng, space[n]) for n in names} for _ in range(int(n_samples))]


def plan(config: Config, space: dict, strategy: str = "grid", n_samples: Optional[int] = None,
         seeds: Union[int, Sequence[int]] = 1, seed: Optional[int] = None) -> List[Config]:
    """Every Config a sweep will run, each one checked.

    Args:
        config: the base Config; fields not in `space` keep its values.
        space: Config field -> list of values (random also takes ranges:
            {"from": a, "to": b, "spacing": "even"|"log", "whole": bool}).
        strategy: "grid" (every combination) or "random" (`n_samples` draws).
        n_samples: number of settings to draw (random only).
        seeds: seeds per setting: a count n (seeds config.seed .. config.seed+n-1)
            or an explicit list.
        seed: seed of the random draws; None uses config.seed.
    Returns:
        list of Config, settings outer and seeds inner (len = settings x seeds;
        a setting that occurs twice is run once).

    Example:
        >>> cfgs = plan(Config(), {"hidden": [8, 16], "activation": ["tanh", "relu"]}, seeds=2)
        >>> len(cfgs)
        8
    """
    if not isinstance(config, Config):
        raise TypeError(f"`config` must be an rnnkit.Config, got {type(config).__name__}")
    if strategy not in STRATEGIES:
        raise ValueError(f"`strategy` (={strategy!r}) must be one of {STRATEGIES}")
    space = check_space(space, strategy)
    seeds = seed_list(config, seeds)
    draw_seed = config.seed if seed is None else seed
    out, seen = [], set()
    for setting in settings(space, strategy, n_samples, draw_seed):
        for s in seeds:
            try:
                c = config.replace(**setting, seed=s)
            except (TypeError, ValueError) as e:
                raise ValueError(f"the space setting {setting} (seed {s}) is not a valid Config: {e}. "
                                 "Remove the offending value from `space` or change the base config"
                                 ) from None
            if c not in seen:
                seen.add(c)
                out.append(c)
    return out
