"""Comparisons of FisherDescent with the baselines, the project's goals, and why a goal is missed.

Ratios are ngopt / baseline, so below 1 means ngopt is faster. When only one
side reached the target, the other side's budget bounds the ratio:

- ngopt reached it, the baseline did not: the baseline would have needed more
  than its whole budget, so ngopt / baseline is *at most* ngopt / budget;
- the baseline reached it, ngopt did not: the ratio is *at least* budget / baseline.
"""

from __future__ import annotations

from typing import Optional

NGOPT = "ngopt"
BASELINES = ("sgd", "adam")

AUTOENCODER_TASK = "digits_autoencoder"
AUTOENCODER_SPEEDUP = {"sgd": 3.0, "adam": 1.5}  # required wall-clock speed-up to target
FLOOR_TOLERANCE = 1.2  # step-time ratio allowed over the arithmetic floor


def step_time_floor(width: int, batch: int) -> float:
    """Arithmetic floor of the ngopt / SGD step-time ratio for a d x d layer and batch B.

    Forward plus backward cost about 6 B d^2 flops for both; natural gradient
    adds the preconditioning G^-1 (grad) A^-1, two d x d products of about
    2 d^3 flops each, so the ratio is at least (6 B d^2 + 4 d^3) / (6 B d^2)
    = 1 + 2d / (3B).
    """
    return 1.0 + 2.0 * width / (3.0 * batch)


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
    result["step_time_floor"] = step_time_floor(width, batch) if width else None
    result["floor_width"], result["floor_batch"] = width, batch
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


def judge_at_most(entry: Optional[dict], threshold: float, neither: str) -> str:
    """Whether a bounded ratio is at most ``threshold``: met, missed, undecided or not evaluated."""
    if entry is None:
        return "not evaluated"
    ratio, relation = entry["ratio"], entry["relation"]
    if relation == "measured":
        return "met" if ratio <= threshold else "missed"
    if relation == "at_most":
        return "met" if ratio <= threshold else "undecided"
    if relation == "at_least":
        return "missed" if ratio > threshold else "undecided"
    return neither


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


def evaluate_goals(tasks: list[dict]) -> list[dict]:
    """The goals of the benchmark issue, judged on the task entries of results.json."""
    goals = []
    for entry in tasks:
        name, comparison = entry["task"], entry["comparison"]
        time_ratios = comparison["time_to_target"]
        if name == AUTOENCODER_TASK:
            for base, speedup in AUTOENCODER_SPEEDUP.items():
                goals.append({
                    "goal": f"{name}: ngopt reaches the target at least {speedup:g}x sooner "
                            f"in wall-clock than {base}",
                    "task": name, "baseline": base, "kind": "speedup",
                    "threshold": 1.0 / speedup,
                    "measured": describe_ratio(time_ratios.get(base)),
                    "status": judge_at_most(time_ratios.get(base), 1.0 / speedup, neither="missed"),
                })
        goals.append({
            "goal": f"{name}: ngopt is not slower to target than sgd",
            "task": name, "baseline": "sgd", "kind": "not_slower",
            "threshold": 1.0,
            "measured": describe_ratio(time_ratios.get("sgd")),
            "status": judge_at_most(time_ratios.get("sgd"), 1.0, neither="undecided"),
        })
        if entry.get("floor_goal") and comparison["step_time_floor"] is not None:
            floor = comparison["step_time_floor"]
            ratio = comparison["step_time"].get("sgd")
            status = "not evaluated" if ratio is None else (
                "met" if ratio <= FLOOR_TOLERANCE * floor else "missed")
            goals.append({
                "goal": f"{name}: ngopt/sgd median step time within {FLOOR_TOLERANCE:g}x of the "
                        f"floor 1 + 2d/(3B) = {floor:.2f} (d={comparison['floor_width']}, "
                        f"B={comparison['floor_batch']})",
                "task": name, "baseline": "sgd", "kind": "step_time",
                "threshold": FLOOR_TOLERANCE * floor,
                "measured": "n/a" if ratio is None else f"{ratio:.2f}",
                "status": status,
            })
    return goals


REMEDIES = {
    "statistics": "refresh the curvature statistics less often (stats_interval) or compute each "
                  "refresh as one batched product per layer",
    "inversion": "invert less often (inverse_interval) or batch the decompositions of equal-sized factors",
    "precondition": "batch the preconditioning products of layers with equal shapes, or give the "
                    "smallest layers a cheaper block",
    "extra_backward": "run the extra (sampled-target) backward pass only on steps that refresh statistics",
    "fallback": "fold the parameters outside curvature blocks into one vectorized update",
    "step_other": "cut the Python work per layer in step() outside the timed parts (see the cProfile "
                  "of a run)",
    "capture": "keep the capture hooks idle (no output copies) on steps without a statistics refresh",
    "forward_backward_extra": "the model's forward and backward take longer than the baseline's "
                              "whole step: the hooks' untimed work (output copies, autograd hooks)",
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


def explain_miss(goal: dict, task_entry: dict) -> str:
    """A sentence on what limits a missed goal, from the measured step counts and time split."""
    summaries = task_entry["summary"]
    ngopt, base = summaries.get(NGOPT), summaries.get(goal["baseline"])
    if ngopt is None or base is None:
        return "not enough optimizers were run to say what limits it"
    comparison = task_entry["comparison"]
    time_entry = comparison["time_to_target"].get(goal["baseline"])
    if goal["status"] == "undecided" and time_entry and time_entry["relation"] == "at_most":
        return (f"{goal['baseline']} never reached the target, so only the bound "
                f"{describe_ratio(time_entry)} is known; a longer budget (--steps) would decide it.")
    parts = []
    if goal["kind"] != "step_time":
        steps_entry = comparison["steps_to_target"].get(goal["baseline"])
        parts.append(f"steps to target ngopt/{goal['baseline']} = {describe_ratio(steps_entry)}")
    step_ratio = comparison["step_time"].get(goal["baseline"])
    parts.append(f"median step time ngopt/{goal['baseline']} = {step_ratio:.2f}")
    costs = per_step_costs(ngopt, base)
    sentence = "; ".join(parts) + "."
    steps_entry = comparison["steps_to_target"].get(goal["baseline"])
    steps_bound = goal["kind"] != "step_time" and (
        steps_entry is None or steps_entry["relation"] in ("at_least", "neither")
        or (steps_entry["relation"] == "measured" and steps_entry["ratio"] > goal["threshold"])
    )
    if steps_bound:
        sentence += (" ngopt's steps alone do not gain enough: the step rule (lr, momentum, damping "
                     "and trust-bound defaults) limits it more than the cost per step; damping that "
                     "follows the curvature's scale and a step size and momentum chosen from the "
                     "quadratic model would move it.")
    if costs:
        mean_ms = ngopt["step_seconds_mean"] * 1e3
        listing = ", ".join(f"{key} {value * 1e3:.2f} ms" for key, value in
                            sorted(costs.items(), key=lambda item: -item[1]))
        largest = max(costs, key=costs.get)
        sentence += (f" Per step ngopt averages {mean_ms:.2f} ms against "
                     f"{base['step_seconds_mean'] * 1e3:.2f} ms for {goal['baseline']}; "
                     f"beyond the baseline it spends {listing}. The largest is {largest}: "
                     f"{REMEDIES.get(largest, 'profile it')}.")
    else:
        sentence += " The optimizer reported no time split, so the per-step cost cannot be broken down."
    return sentence
