"""Comparisons of FisherDescent with the baselines: time and steps to target, and step time.

Ratios are ngopt / baseline, so below 1 means ngopt is faster. When only one
side reached the target, the other side's budget bounds the ratio:

- ngopt reached it, the baseline did not: the baseline would have needed more
  than its whole budget, so ngopt / baseline is *at most* ngopt / budget;
- the baseline reached it, ngopt did not: the ratio is *at least* budget / baseline.
"""

from __future__ import annotations

from typing import Optional

from benchmarks.optimizers import BASELINES

NGOPT = "ngopt"


def step_time_flop_estimate(width: int, batch: int) -> float:
    """Flop-count estimate of the ngopt / SGD step-time ratio for d x d layers and batch B.

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
    "per d x d layer, for both optimizers) and of ngopt's two preconditioning products (about 4d^3); "
    "it is not a bound: step times are not proportional to flops, and measured ratios fall below it "
    "at small batch")


def bounded_ratio(
    ngopt_value: Optional[float], ngopt_budget: float,
    base_value: Optional[float], base_budget: float,
) -> dict:
    """ngopt / baseline with the relation that holds: measured, at_most, at_least or neither."""
    if ngopt_value is not None and base_value is not None:
        return {"ratio": ngopt_value / base_value, "relation": "measured"}
    if ngopt_value is not None:
        return {"ratio": ngopt_value / base_budget, "relation": "at_most"}
    if base_value is not None:
        return {"ratio": ngopt_budget / base_value, "relation": "at_least"}
    return {"ratio": None, "relation": "neither"}


def compare(summaries: dict[str, dict], steps: int, width: Optional[int], batch: int) -> dict:
    """ngopt against each baseline present: time to target, steps to target, step time."""
    result: dict = {"time_to_target": {}, "steps_to_target": {}, "step_time": {}}
    result["step_time_flop_estimate"] = step_time_flop_estimate(width, batch) if width else None
    result["estimate_width"], result["estimate_batch"] = width, batch
    ngopt = summaries.get(NGOPT)
    if ngopt is None:
        return result
    for name in BASELINES:
        base = summaries.get(name)
        if base is None:
            continue
        result["time_to_target"][name] = bounded_ratio(
            ngopt["seconds_to_target"], ngopt["train_seconds"],
            base["seconds_to_target"], base["train_seconds"],
        )
        result["steps_to_target"][name] = bounded_ratio(
            ngopt["steps_to_target"], steps, base["steps_to_target"], steps,
        )
        result["step_time"][name] = ngopt["step_seconds_median"] / base["step_seconds_median"]
    return result


def describe_ratio(entry: Optional[dict]) -> str:
    if entry is None:
        return "n/a"
    ratio, relation = entry["ratio"], entry["relation"]
    if relation == "measured":
        return f"{ratio:.2f}"
    if relation == "at_most":
        return f"<= {ratio:.2f} (baseline never reached the target)"
    if relation == "at_least":
        return f">= {ratio:.2f} (ngopt never reached the target)"
    return "n/a (neither reached the target)"


# The knob a user has over each part of the step that ngopt times itself.
USER_KNOBS = {
    "statistics": "stats_interval",
    "statistics_in_backward": "stats_interval, stats_fraction",
    "inversion": "inverse_interval",
    "extra_backward": "fisher (the sampled and exact Fishers take an extra backward pass)",
}


def per_step_costs(ngopt: dict, baseline: dict) -> Optional[dict]:
    """ngopt's mean step cost beyond the baseline's, by part.

    Every part ngopt times itself is extra work; "forward_backward_extra" is
    ngopt's "rest" (the model's forward and backward and untimed hook work)
    minus the baseline's whole mean step, which is its forward and backward
    plus a cheap update.
    """
    split = ngopt.get("time_split_per_step")
    if not split:
        return None
    costs = {key: value for key, value in split.items() if key != "rest"}
    costs["forward_backward_extra"] = split["rest"] - baseline["step_seconds_mean"]
    return costs


def step_time_breakdown(task_entry: dict, baseline: str) -> Optional[str]:
    """Where ngopt's mean step time beyond the baseline's goes, from its own timers."""
    summaries = task_entry["summary"]
    ngopt, base = summaries.get(NGOPT), summaries.get(baseline)
    if ngopt is None or base is None:
        return None
    costs = per_step_costs(ngopt, base)
    if not costs:
        return None
    listing = ", ".join(f"{key} {value * 1e3:.2f} ms" for key, value in
                        sorted(costs.items(), key=lambda item: -item[1]))
    largest = max(costs, key=costs.get)
    sentence = (f"per step ngopt averages {ngopt['step_seconds_mean'] * 1e3:.2f} ms against "
                f"{base['step_seconds_mean'] * 1e3:.2f} ms for {baseline}; the difference by part: "
                f"{listing}; the largest is {largest}")
    if largest in USER_KNOBS:
        sentence += f" (set by {USER_KNOBS[largest]})"
    return sentence + "."
