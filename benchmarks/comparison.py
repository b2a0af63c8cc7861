"""Comparisons of FisherDescent with the baselines: time and steps to target, and step time.

Ratios are fisher-descent / baseline (the untuned FisherDescent row), so below
1 means FisherDescent is faster. When only one side reached the target, the
other side's budget bounds the ratio:

- fisher-descent reached it, the baseline did not: the baseline would have
  needed more than its whole budget, so the ratio is *at most* fisher-descent / budget;
- the baseline reached it, fisher-descent did not: the ratio is *at least* budget / baseline.
"""

from __future__ import annotations

import math
from typing import Optional

from benchmarks.optimizers import BASELINES, HEADLINE


def step_time_flop_estimate(width: int, batch: int) -> float:
    """Flop-count estimate of the FisherDescent / SGD step-time ratio for d x d layers and batch B.

    Forward plus backward cost about 6 B d^2 flops per layer for both;
    natural gradient adds the preconditioning G^-1 (grad) A^-1, two d x d
    products of about 2 d^3 flops each, so the flops grow by the factor
    (6 B d^2 + 4 d^3) / (6 B d^2) = 1 + 2d / (3B). It is an estimate, not a
    bound: step times are not proportional to flops (fixed per-step costs,
    memory traffic and the speed of each kernel weigh on both optimizers), and
    measured ratios fall below it at small batch.
    """
    return 1.0 + 2.0 * width / (3.0 * batch)


FLOP_ESTIMATE_TEXT = (
    "the flop-count estimate 1 + 2d/(3B) counts the multiply-adds of forward and backward (about 6Bd^2 "
    "per d x d layer, for both optimizers) and of FisherDescent's two preconditioning products (about 4d^3); "
    "it is not a bound: step times are not proportional to flops, and measured ratios fall below it "
    "at small batch")


def bounded_ratio(
    method_value: Optional[float], method_budget: float,
    base_value: Optional[float], base_budget: float,
) -> dict:
    """fisher-descent / baseline with the relation that holds: measured, at_most, at_least or neither."""
    if method_value is not None and base_value is not None:
        return {"ratio": method_value / base_value, "relation": "measured"}
    if method_value is not None:
        return {"ratio": method_value / base_budget, "relation": "at_most"}
    if base_value is not None:
        return {"ratio": method_budget / base_value, "relation": "at_least"}
    return {"ratio": None, "relation": "neither"}


def best_baseline(summaries: dict[str, dict]) -> Optional[str]:
    """The baseline that reached the target in the least median wall-clock time.

    When no baseline reached it, the one with the lowest final training loss
    (a diverged one last); None when no baseline ran.
    """
    present = [name for name in BASELINES if name in summaries]
    reached = [name for name in present if summaries[name]["seconds_to_target"] is not None]
    if reached:
        return min(reached, key=lambda name: summaries[name]["seconds_to_target"])
    finals = {name: summaries[name]["final_train_loss"] for name in present}
    return min(present, key=lambda name: math.inf if finals[name] is None else finals[name], default=None)


def compare(summaries: dict[str, dict], steps: int, width: Optional[int], batch: int) -> dict:
    """fisher-descent against each baseline present (time to target, steps to target, step time), and
    which baseline was best."""
    result: dict = {"time_to_target": {}, "steps_to_target": {}, "step_time": {},
                    "best_baseline": best_baseline(summaries)}
    result["step_time_flop_estimate"] = step_time_flop_estimate(width, batch) if width else None
    result["estimate_width"], result["estimate_batch"] = width, batch
    method = summaries.get(HEADLINE)
    if method is None:
        return result
    result["curvature_free_time"] = curvature_free_ratio(method, summaries.get(result["best_baseline"]))
    result["preconditioning_floor_time"] = preconditioning_floor_ratio(method, summaries, result["best_baseline"])
    for name in BASELINES:
        base = summaries.get(name)
        if base is None:
            continue
        result["time_to_target"][name] = bounded_ratio(
            method["seconds_to_target"], method["train_seconds"],
            base["seconds_to_target"], base["train_seconds"],
        )
        result["steps_to_target"][name] = bounded_ratio(
            method["steps_to_target"], steps, base["steps_to_target"], steps,
        )
        result["step_time"][name] = method["step_seconds_median"] / base["step_seconds_median"]
    return result


def curvature_free_ratio(method: dict, best: Optional[dict]) -> Optional[dict]:
    """fisher-descent's time to target with its curvature work free, over the best baseline's time.

    A lower bound on what cheaper statistics, extra backward passes and inversions can achieve at the
    steps it took: above 1, only fewer steps or a cheaper rest of the step would put it ahead.  None
    where fisher-descent did not reach the target or kept no timers.
    """
    free = method.get("curvature_free_seconds_to_target")
    if free is None or best is None:
        return None
    return bounded_ratio(free, method["train_seconds"], best["seconds_to_target"], best["train_seconds"])


def preconditioning_floor_ratio(method: dict, summaries: dict[str, dict], best: Optional[str]) -> Optional[dict]:
    """fisher-descent's time to target had every step cost only the cheapest baseline's median step plus
    its own preconditioning products, over the best baseline's time.

    A natural-gradient step does at least a first-order step's forward, backward and update, and the
    products that precondition the gradient.  Above 1, no cheaper curvature, hooks or rules can put it
    ahead at the steps it took: only fewer steps could.  The ratio, its relation, ``seconds`` (the
    floor) and ``step_of`` (the baseline whose step it counts).  None where fisher-descent did not reach
    the target, kept no timers, or no baseline ran.
    """
    steps, preconditioning = method.get("steps_to_target"), method.get("precondition_seconds_to_target")
    steps_of = {name: summary["step_seconds_median"] for name, summary in summaries.items() if name in BASELINES}
    if steps is None or preconditioning is None or not steps_of or best is None:
        return None
    cheapest = min(steps_of, key=steps_of.get)
    floor = steps * steps_of[cheapest] + preconditioning
    base = summaries[best]
    ratio = bounded_ratio(floor, method["train_seconds"], base["seconds_to_target"], base["train_seconds"])
    return dict(ratio, seconds=floor, step_of=cheapest)


def describe_ratio(entry: Optional[dict]) -> str:
    if entry is None:
        return "n/a"
    ratio, relation = entry["ratio"], entry["relation"]
    if relation == "measured":
        return f"{ratio:.2f}"
    if relation == "at_most":
        return f"<= {ratio:.2f} (baseline never reached the target)"
    if relation == "at_least":
        return f">= {ratio:.2f} ({HEADLINE} never reached the target)"
    return "n/a (neither reached the target)"


# The knob a user has over each part of the step that FisherDescent times itself.
USER_KNOBS = {
    "statistics": "stats_interval",
    "statistics_in_backward": "stats_interval, stats_fraction",
    "inversion": "inverse_interval",
    "extra_backward": "fisher (the sampled and exact Fishers take an extra backward pass)",
}


def per_step_costs(method: dict, baseline: dict) -> Optional[dict]:
    """fisher-descent's mean step cost beyond the baseline's, by part.

    Every part FisherDescent times itself is extra work; "forward_backward_extra" is
    its "rest" (the model's forward and backward and untimed hook work)
    minus the baseline's whole mean step, which is its forward and backward
    plus a cheap update.
    """
    split = method.get("time_split_per_step")
    if not split:
        return None
    costs = {key: value for key, value in split.items() if key != "rest"}
    costs["forward_backward_extra"] = split["rest"] - baseline["step_seconds_mean"]
    return costs


def step_time_breakdown(task_entry: dict, baseline: str) -> Optional[str]:
    """Where fisher-descent's mean step time beyond the baseline's goes, from its own timers."""
    summaries = task_entry["summary"]
    method, base = summaries.get(HEADLINE), summaries.get(baseline)
    if method is None or base is None:
        return None
    costs = per_step_costs(method, base)
    if not costs:
        return None
    listing = ", ".join(f"{key} {value * 1e3:.2f} ms" for key, value in
                        sorted(costs.items(), key=lambda item: -item[1]))
    largest = max(costs, key=costs.get)
    sentence = (f"per step {HEADLINE} averages {method['step_seconds_mean'] * 1e3:.2f} ms against "
                f"{base['step_seconds_mean'] * 1e3:.2f} ms for {baseline}; the difference by part: "
                f"{listing}; the largest is {largest}")
    if largest in USER_KNOBS:
        sentence += f" (set by {USER_KNOBS[largest]})"
    return sentence + "."
