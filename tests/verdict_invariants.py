"""What every verdict document must say, whatever the run: the checks the invariant tests share.

- A run with status ``fail`` says what to do: every failing finding puts a result
  on the re-run list, or is carried to the samples by a consequence that does
  (its ``causes``), or is a reason in ``repeat`` (the calibration or the run).
- A result without a concentration is never silent: it carries a flag, a finding
  names it, and the run fails unless the result is only below the range.
"""

from __future__ import annotations

from typing import Any

#: A result may lack a concentration and the run still pass only for this reason.
LEGITIMATE_GAP_FLAGS = frozenset({"below_range"})


def problems(document: dict[str, Any]) -> list[str]:
    """Every way the document breaks the invariants (empty: it keeps them)."""
    if document["status"] == "error":
        return []
    found = []
    reruns = {(entry["seq"], a) for entry in document["reruns"] for a in entry["analytes"]}
    fails = [f for f in document["findings"] if f["severity"] == "fail"]
    if (document["status"] == "fail") != bool(fails):
        found.append(f"status {document['status']} with {len(fails)} failing findings")
    if document["status"] == "fail" and not document["reruns"] and not document["repeat"]:
        found.append("fails without saying what to do")

    def on_reruns(finding: dict[str, Any]) -> bool:
        return any((a["seq"], finding["analyte"]) in reruns for a in finding["affected"])

    carried = {(f["analyte"], cause["seq"]) for f in fails if on_reruns(f) for cause in f["causes"]}
    repeat_reasons = {
        (entry["analyte"], reason) for entry in document["repeat"] for reason in entry["reasons"]
    }
    for finding in fails:
        if on_reruns(finding) or (finding["analyte"], finding["seq"]) in carried:
            continue
        if (finding["analyte"], finding["message"]) in repeat_reasons:
            continue
        found.append(f"says nothing to do about [{finding['rule']}] {finding['message']}")

    named = {(a["seq"], f["analyte"]) for f in document["findings"] for a in f["affected"]}
    for result in document["results"]:
        if result["concentration"] is not None:
            continue
        where = f"{result['sample_id']} (seq {result['seq']}) {result['analyte']}"
        if not result["flags"]:
            found.append(f"{where} has no concentration and no flag")
        if (result["seq"], result["analyte"]) not in named:
            found.append(f"{where} has no concentration and no finding names it")
        if document["status"] == "pass" and not LEGITIMATE_GAP_FLAGS.intersection(result["flags"]):
            found.append(f"{where} has no concentration and the run passed")
    return found
