"""What the averages hide: the cautions a run's results call for, one plain line each — the task's own (a
classifier's: a class that lost much more than the average accuracy, a drop within the budget that the test split
is too small to settle), test texts the student saw the teacher's answers on, a trimmed vocabulary that loses test
tokens. The report, the model card, the gate and the search all say them from here."""
from __future__ import annotations

from typing import Optional

from shrinkwrap.outputs.results import data_info, lineage, steps_of
from shrinkwrap.outputs.tasks import of_results

# Share of test tokens a trimmed vocabulary no longer holds, and share of test texts it splits otherwise, above
# which the trimming is called out.
OOV_CAUTION = 0.005
CHANGED_CAUTION = 0.01


def cautions_by_step(results: dict, budget=None) -> list[tuple[Optional[str], str]]:
    """Every caution as (the step it concerns, or None for the run as a whole; one line): what the table's
    averages can hide — the task's own (a classifier's: a class much worse than the average, a drop the test
    split cannot settle; `budget` a BudgetConfig, else the recipe's), test texts the student saw the teacher's
    answers on, and a trimmed vocabulary that loses test tokens."""
    out: list[tuple[Optional[str], str]] = list(of_results(results).cautions(results, budget))
    overlap = data_info(results).get("transfer_in_test")
    if overlap:
        out.append((None, f"{overlap} transfer texts also occur in the test split: the student saw the teacher's "
                          f"answers on them, so its test accuracy is optimistic"))
    overlap = data_info(results).get("augmented_in_test")
    if overlap:
        out.append((None, f"{overlap} augmented copies of training texts are also test texts: the student saw the "
                          f"teacher's answers on them, so its test accuracy is optimistic"))
    for s in steps_of(results):
        info = s["info"] if isinstance(s.get("info"), dict) else {}
        rate, changed = info.get("test_oov_rate"), info.get("test_changed_share")
        if (rate or 0) > OOV_CAUTION or (changed or 0) > CHANGED_CAUTION:
            line = f"{s['name']}: "
            if changed is not None:  # recorded since trimming handles BPE and Unigram; older results lack it
                line += (f"the trimmed tokenizer splits {changed * 100:.2f} % of the test texts "
                         f"({round(changed * info['test_texts'])} of {info['test_texts']}) otherwise than the full one; ")
            out.append((s["name"], line + f"{rate * 100:.2f} % of the test tokens ({round(rate * info['test_tokens'])} "
                                          f"of {info['test_tokens']}) are no longer in the trimmed vocabulary and fall "
                                          f"back to unknown or shorter pieces"))
    return out


def cautions(results: dict, budget=None) -> list[str]:
    """Every caution, one line each (cautions_by_step without the steps): the console's and results.json's."""
    return [line for _, line in cautions_by_step(results, budget)]


def concern_release(results: dict, step: Optional[str]) -> bool:
    """Whether a caution about `step` (None: the whole run) concerns what ships: the final step and every step it
    was made from; the steps only measured beside them (e.g. student-int8) do not."""
    return step is None or step in lineage(results)
