"""The usual alternative to weir, for the load benchmark: a FastAPI service around a
scikit-learn model, computing the same 29 features (claim fields with NumPy, history across
claims in Python dictionaries) and scoring with the same fitted model (weir's artifact loaded
into sklearn's LogisticRegression and NumPy k-means distances).

It is written the way a team would write it in a hurry, not tuned, and it does *less* than
weir: history is kept in memory only (a restart loses it), no decision is written to disk, no
queues, no audit record, no access control. A faster Python is possible; this is the common
baseline the comparison in the README is about.

    pip install -r benches/reference/requirements.txt
    python3 benches/reference/service.py --model model.json --port 18082
"""

import argparse
import bisect
import datetime as dt
import json
import math

import numpy as np
import uvicorn
from fastapi import FastAPI
from pydantic import BaseModel, Field
from sklearn.linear_model import LogisticRegression

DAY = 86_400
SHORT, LONG = 30 * DAY, 365 * DAY


class Party(BaseModel):
    role: str
    id: str


class Circumstances(BaseModel):
    police_report: bool
    injury: bool = False
    total_loss: bool = False
    theft: bool = False


class Claim(BaseModel):
    claim_id: str = Field(min_length=1, max_length=128)
    policy_id: str
    claimant_id: str
    line: str
    loss_date: dt.date
    loss_time: dt.time | None = None
    reported_at: dt.datetime
    policy_start: dt.date
    claimed_amount: float = Field(gt=0)
    sum_insured: float = Field(gt=0)
    currency: str
    region: str | None = None
    address_id: str | None = None
    parties: list[Party] = []
    circumstances: Circumstances


class History:
    """entity key -> sorted list of (time, claim id, claimant id, amount)."""

    def __init__(self):
        self.events = {}

    def stats(self, key, t, claim_id, claimant):
        lst = self.events.get(key, [])
        lo = bisect.bisect_left(lst, (t - LONG,))
        hi = bisect.bisect_left(lst, (t,))
        short = long_ = 0
        amount = 0.0
        others = set()
        for (at, cid, who, amt) in lst[lo:hi]:
            if cid == claim_id:
                continue
            long_ += 1
            amount += amt
            if at >= t - SHORT:
                short += 1
            if who != claimant:
                others.add(who)
        return short, long_, amount, len(others)

    def record(self, c, t):
        for key in entity_keys(c):
            bisect.insort(self.events.setdefault(key, []), (t, c.claim_id, c.claimant_id, c.claimed_amount))


def entity_keys(c):
    keys = {f"claimant:{c.claimant_id}", f"policy:{c.policy_id}"}
    if c.address_id:
        keys.add(f"address:{c.address_id}")
    for p in c.parties:
        keys.add(f"{p.role}:{p.id}")
    return keys


def features(c, h):
    t = int(c.reported_at.timestamp())
    days_to_loss = (c.loss_date - c.policy_start).days
    days_to_report = (c.reported_at.date() - c.loss_date).days
    hour = c.loss_time.hour if c.loss_time else None
    st = lambda k: h.stats(k, t, c.claim_id, c.claimant_id)

    def by_role(role):
        best = (0, 0, 0.0, 0)
        for p in c.parties:
            if p.role == role:
                best = tuple(max(a, b) for a, b in zip(best, st(f"{role}:{p.id}")))
        return best

    cl = st(f"claimant:{c.claimant_id}")
    rep, med, att = by_role("repairer"), by_role("medical_provider"), by_role("attorney")
    pay, wit = by_role("payee_account"), by_role("witness")
    addr = st(f"address:{c.address_id}") if c.address_id else (0, 0, 0.0, 0)
    return np.array([
        c.claimed_amount / c.sum_insured, math.log1p(c.claimed_amount), days_to_loss,
        days_to_report, float(hour is not None and not (6 <= hour < 22)), float(hour is None),
        float(not c.circumstances.police_report), float(c.circumstances.injury),
        float(c.circumstances.total_loss), float(c.circumstances.theft), float(c.line == "home"),
        len(c.parties), float(days_to_loss < 30), float(days_to_report > 30),
        cl[0], cl[1], math.log1p(cl[2]), st(f"policy:{c.policy_id}")[1],
        rep[0], rep[3], med[0], med[3], att[1], att[3], pay[1], pay[3], wit[1], addr[1], addr[3],
    ], dtype=float)


def load_model(path):
    a = json.load(open(path))
    clf = a["classifier"]
    if clf["kind"] != "logistic_regression":
        raise SystemExit("the reference service reproduces logistic-regression models only")
    lr = LogisticRegression()
    lr.classes_ = np.array([0, 1])
    lr.coef_ = np.array([clf["coef"]])
    lr.intercept_ = np.array([clf["intercept"]])
    return a, lr


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", required=True)
    ap.add_argument("--port", type=int, default=18082)
    args = ap.parse_args()
    artifact, lr = load_model(args.model)
    mean = np.array(artifact["standardiser"]["mean"])
    scale = np.array(artifact["standardiser"]["scale"])
    centres = np.array(artifact["outliers"]["centres"])
    spreads = [np.array(s) for s in artifact["outliers"]["spreads"]]
    cal = artifact["calibration"]
    threshold = artifact["threshold"]
    history = History()
    decisions = {}
    app = FastAPI()

    @app.post("/v1/claims", status_code=201)
    def post_claim(c: Claim):
        x = features(c, history)
        z = ((x - mean) / scale).reshape(1, -1)
        margin = float(lr.decision_function(z)[0])
        p = 1.0 / (1.0 + math.exp(-(cal["a"] * margin + cal["b"])))
        d = np.sqrt(((centres - z) ** 2).sum(axis=1))
        k = int(d.argmin())
        outlier = float(np.searchsorted(spreads[k], d[k]) / max(len(spreads[k]), 1))
        history.record(c, int(c.reported_at.timestamp()))
        queue = "investigate" if p >= 0.5 else "desk_check" if p >= threshold else "no_review"
        decisions[c.claim_id] = (queue, p, outlier)
        return {"claim_id": c.claim_id, "queue": queue, "model_probability": p, "outlier_score": outlier}

    uvicorn.run(app, host="127.0.0.1", port=args.port, log_level="warning")


if __name__ == "__main__":
    main()
