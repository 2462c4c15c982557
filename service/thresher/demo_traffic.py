"""Invented demo traffic for "Harbourside Swap", a made-up community marketplace.

Volunteer moderators label each new listing ``fine`` or ``fraud``. The scenario, the
marketplace, its categories, the payout region codes ("R-North", "R-Isle", ...) and every word
list below are invented for demonstrations and load tests; none describes a real place, firm
or person. The generator is pure: no I/O, no clocks, randomness only from a seeded numpy
``Generator``, so a seed always yields the same traffic.

Two fraud campaigns run one after the other. Before the shift, fraudsters sell phones and
tickets far below the usual price from brand-new accounts, with "urgent sale", "pay first"
and "no meetups" wording and payouts to R-Isle or R-Fen. From ``shift_at`` on, a second
campaign takes over: pets and prams at a modest discount from old (hijacked-looking) accounts
with several photos, "gift card", "crypto wallet", "moving abroad" and "deposit to hold"
wording, and payouts to R-Cape or R-Marsh. A model trained on the first campaign mostly calls
the second one fine, so its mistake rate jumps after the shift and falls as it learns.

Usage::

    traffic = ListingTraffic(seed=1, shift_at=3000)
    event_id, fields, label = traffic.next_event()
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = ["DEMO_MODEL", "DEMO_SPEC", "ListingTraffic"]

# Edges are in the transformed (log1p) space: the features module applies log1p, then clip,
# then buckets. log1p edges 1.5 .. 7.5 are prices of about 3.5, 11, 32, 89, 244, 664, 1807.
DEMO_SPEC: dict[str, Any] = {
    "fields": {
        "title": {"kind": "text", "ngrams": 2},
        "description": {"kind": "text", "ngrams": 1},
        "price": {"kind": "numeric", "log1p": True,
                  "buckets": [1.5, 2.5, 3.5, 4.5, 5.5, 6.5, 7.5]},
        "seller_age_days": {"kind": "numeric", "log1p": True,
                            "buckets": [0.7, 1.5, 2.5, 3.5, 4.5, 5.5, 6.5]},
        "category": {"kind": "categorical"},
        "payout_country": {"kind": "categorical"},
        "shipping": {"kind": "categorical"},
        "photos": {"kind": "numeric", "clip": [0, 12]},
        "tags": {"kind": "set"},
    },
    "crosses": [["category", "payout_country"]],
    "strict": False,
}  # fmt: skip

DEMO_MODEL: dict[str, Any] = {
    "name": "listings",
    "classes": ["fine", "fraud"],
    "features": DEMO_SPEC,
    "bits": 20,
    "rule": "averaged",
    "seed": 7,
}

CATEGORIES: dict[str, dict[str, Any]] = {
    "bikes": {"price": 180.0, "items": ["road bike", "mountain bike", "kids bike",
              "folding bike", "bike trailer"],
              "words": ["gears", "frame", "tyres", "brakes", "serviced", "saddle", "lights",
                        "chain", "pedals", "mudguards"]},
    "furniture": {"price": 120.0, "items": ["oak table", "corner sofa", "bookcase",
                  "desk chair", "wardrobe"],
                  "words": ["drawers", "cushions", "legs", "varnish", "shelves", "fabric",
                            "assembled", "sturdy", "finish", "doors"]},
    "phones": {"price": 350.0, "items": ["smartphone", "phone handset", "dual sim phone",
               "phone with case"],
               "words": ["screen", "battery", "charger", "unlocked", "storage", "camera",
                         "scratches", "boxed", "cable", "protector"]},
    "tickets": {"price": 90.0, "items": ["concert tickets", "festival pass", "match tickets",
                "theatre tickets"],
                "words": ["seats", "standing", "row", "entry", "weekend", "venue", "pair",
                          "evening", "transfer", "names"]},
    "pets": {"price": 400.0, "items": ["puppy", "kitten", "young rabbit", "pair of budgies"],
             "words": ["vaccinated", "wormed", "playful", "weeks", "litter", "parents", "vet",
                       "checked", "toys", "house trained"]},
    "tools": {"price": 60.0, "items": ["drill set", "socket set", "step ladder",
              "hedge trimmer", "tool chest"],
              "words": ["cordless", "battery", "bits", "case", "blades", "spare", "workshop",
                        "heavy duty", "tested", "manual"]},
    "books": {"price": 8.0, "items": ["paperback bundle", "cookbook", "novel set", "atlas",
              "picture books"],
              "words": ["pages", "spine", "hardback", "edition", "series", "signed", "clean",
                        "shelf", "stories", "covers"]},
    "garden": {"price": 45.0, "items": ["planters", "garden bench", "hose reel", "bird bath",
               "compost bin"],
               "words": ["weatherproof", "wooden", "pots", "outdoor", "lawn", "seeds",
                         "patio", "frost", "soil", "shed"]},
    "games": {"price": 30.0, "items": ["board game", "puzzle box", "console game",
              "card game set"],
              "words": ["pieces", "complete", "players", "rules", "family", "cards", "disc",
                        "controller", "expansion", "dice"]},
    "prams": {"price": 220.0, "items": ["pram", "pushchair", "travel system", "carrycot"],
              "words": ["wheels", "hood", "basket", "folds", "rain cover", "newborn",
                        "harness", "brake", "handle", "liner"]},
}  # fmt: skip
FINE_CATEGORY_WEIGHTS = {"bikes": 1.2, "furniture": 1.3, "phones": 1.0, "tickets": 0.8,
                         "pets": 0.6, "tools": 1.0, "books": 1.1, "garden": 1.0, "games": 1.0,
                         "prams": 0.6}  # fmt: skip

FINE_REGIONS = ["R-North", "R-South", "R-Vale", "R-Ridge", "R-Harbour", "R-Moor"]
FINE_REGION_WEIGHTS = [0.25, 0.22, 0.18, 0.15, 0.12, 0.08]
FINE_OPENINGS = [
    "selling my", "for sale", "offering a", "up for grabs", "clearing out", "letting go of",
]  # fmt: skip
FINE_CLOSINGS = [
    "collection from town centre", "happy to meet nearby", "message with questions",
    "can post if needed", "cash on collection", "viewing welcome any evening",
]  # fmt: skip
FINE_ADJECTIVES = ["used", "vintage", "lovely", "solid", "spare", "classic", "compact", "good"]
FINE_TAGS = ["good-condition", "local", "collection", "negotiable", "like-new", "smoke-free",
             "well-kept", "barely-used", "family-home", "spare"]  # fmt: skip
# Genuine sellers sometimes use a phrase a campaign also uses; keeps the problem honest.
FINE_ODD_PHRASES = ["quick sale", "moving abroad", "price is firm", "no offers"]

# The campaign before the shift, and the one after it.
CAMPAIGNS: dict[str, dict[str, Any]] = {
    "before": {
        "categories": ["phones", "tickets", "games"], "category_p": [0.5, 0.4, 0.1],
        "regions": ["R-Isle", "R-Fen"], "region_p": [0.6, 0.4], "own_region_share": 0.95,
        "discount": (0.1, 0.3), "age": (0, 4), "photos": (0, 2),
        "shipping": ["post", "courier"], "shipping_p": [0.6, 0.4],
        "phrases": ["urgent sale", "pay first", "no meetups", "bank transfer only",
                    "first to pay gets it"],
        "adjectives": ["brand new", "sealed", "latest", "cheapest"],
        "tags": ["urgent", "cheapest", "new-in-box", "first-come", "sealed"],
    },
    "after": {
        "categories": ["pets", "prams"], "category_p": [0.55, 0.45],
        "regions": ["R-Cape", "R-Marsh"], "region_p": [0.5, 0.5], "own_region_share": 0.75,
        "discount": (0.4, 0.7), "age": (300, 2500), "photos": (2, 7),
        "shipping": ["courier", "post"], "shipping_p": [0.8, 0.2],
        "phrases": ["gift card", "crypto wallet", "moving abroad", "deposit to hold",
                    "courier will deliver"],
        "adjectives": ["adorable", "rare", "premium", "beautiful"],
        "tags": ["rehoming", "reserved", "must-go", "deposit", "delivery-included"],
    },
}  # fmt: skip
# After the shift a few listings still come from the old campaign.
OLD_CAMPAIGN_SHARE = 0.15


class ListingTraffic:
    """A seeded stream of invented listings with moderator labels and a campaign shift."""

    classes = ("fine", "fraud")

    def __init__(
        self,
        *,
        seed: int = 0,
        shift_at: int = 3000,
        fraud_rate: float = 0.12,
        label_noise: float = 0.02,
    ) -> None:
        if isinstance(shift_at, bool) or not isinstance(shift_at, int) or shift_at < 0:
            raise ValueError(f"shift_at must be a whole number >= 0, got {shift_at!r}")
        for name, value in (("fraud_rate", fraud_rate), ("label_noise", label_noise)):
            if not 0.0 <= value <= 1.0:
                raise ValueError(f"{name} must be between 0 and 1, got {value!r}")
        self.seed = seed
        self.shift_at = shift_at
        self.fraud_rate = fraud_rate
        self.label_noise = label_noise
        self.index = 0
        self._rng = np.random.default_rng(seed)
        cats = list(FINE_CATEGORY_WEIGHTS)
        weights = np.array([FINE_CATEGORY_WEIGHTS[c] for c in cats])
        self._fine_categories = (cats, weights / weights.sum())

    def phase(self, index: int) -> str:
        """``"before"`` for events ahead of the shift, ``"after"`` from ``shift_at`` on."""
        return "before" if index < self.shift_at else "after"

    def next_event(self) -> tuple[str, dict[str, Any], str]:
        """The next listing: (event id, fields, the moderators' label, 2% of them wrong)."""
        index = self.index
        self.index += 1
        rng = self._rng
        fraud = bool(rng.random() < self.fraud_rate)
        if fraud:
            campaign = self.phase(index)
            if campaign == "after" and rng.random() < OLD_CAMPAIGN_SHARE:
                campaign = "before"
            fields = self._fraud(CAMPAIGNS[campaign])
        else:
            fields = self._fine()
        if rng.random() < self.label_noise:
            fraud = not fraud
        return f"lst-{index:06d}", fields, "fraud" if fraud else "fine"

    def batch(self, n: int) -> list[tuple[str, dict[str, Any], str]]:
        """The next ``n`` listings."""
        if n < 0:
            raise ValueError(f"n must be >= 0, got {n}")
        return [self.next_event() for _ in range(n)]

    # -- the two kinds of listing ---------------------------------------------------------

    def _fine(self) -> dict[str, Any]:
        rng = self._rng
        names, weights = self._fine_categories
        category = names[int(rng.choice(len(names), p=weights))]
        info = CATEGORIES[category]
        title = [self._pick(FINE_ADJECTIVES), self._pick(info["items"])]
        if rng.random() < 0.4:
            title.append(self._pick(["for sale", "bargain", "to collect", "spare"]))
        words = [self._pick(FINE_OPENINGS), *self._sample(info["words"], 5, 7)]
        if rng.random() < 0.05:
            words.append(self._pick(FINE_ODD_PHRASES))
        words.append(self._pick(FINE_CLOSINGS))
        region = FINE_REGIONS[int(rng.choice(len(FINE_REGIONS), p=FINE_REGION_WEIGHTS))]
        if rng.random() < 0.02:  # a few honest sellers are paid out in campaign regions
            region = self._pick(["R-Isle", "R-Fen", "R-Cape", "R-Marsh"])
        return {
            "title": " ".join(title),
            "description": " ".join(words),
            "price": round(info["price"] * float(rng.lognormal(0.0, 0.45)), 2),
            "category": category,
            "seller_age_days": int(min(4000.0, rng.lognormal(5.5, 1.2))),
            "payout_country": region,
            "photos": int(min(12, 1 + rng.poisson(3.0))),
            "shipping": self._pick(["pickup", "post", "courier"], [0.6, 0.3, 0.1]),
            "tags": sorted(set(self._sample(FINE_TAGS, 2, 4))),
        }

    def _fraud(self, c: dict[str, Any]) -> dict[str, Any]:
        rng = self._rng
        category = self._pick(c["categories"], c["category_p"])
        info = CATEGORIES[category]
        title = [self._pick(c["adjectives"]), self._pick(info["items"])]
        words = [*self._sample(c["phrases"], 2, 3), *self._sample(info["words"], 3, 5)]
        if rng.random() < 0.5:
            words.append(self._pick(FINE_CLOSINGS))
        if rng.random() < c["own_region_share"]:
            region = self._pick(c["regions"], c["region_p"])
        else:
            region = FINE_REGIONS[int(rng.integers(len(FINE_REGIONS)))]
        lo, hi = c["discount"]
        age_lo, age_hi = c["age"]
        photos_lo, photos_hi = c["photos"]
        tags = self._sample(c["tags"], 2, 3)
        if rng.random() < 0.3:
            tags.append(self._pick(FINE_TAGS))
        return {
            "title": " ".join(title),
            "description": " ".join(words),
            "price": round(info["price"] * float(rng.uniform(lo, hi)), 2),
            "category": category,
            "seller_age_days": int(rng.integers(age_lo, age_hi)),
            "payout_country": region,
            "photos": int(rng.integers(photos_lo, photos_hi)),
            "shipping": self._pick(c["shipping"], c["shipping_p"]),
            "tags": sorted(set(tags)),
        }

    # -- draws ----------------------------------------------------------------------------

    def _pick(self, options: Sequence[str], p: Sequence[float] | None = None) -> str:
        if p is None:
            return options[int(self._rng.integers(len(options)))]
        return options[int(self._rng.choice(len(options), p=p))]

    def _sample(self, options: Sequence[str], lo: int, hi: int) -> list[str]:
        """Between ``lo`` and ``hi`` distinct options, in a random order."""
        k = int(self._rng.integers(lo, hi + 1))
        chosen = self._rng.choice(len(options), size=min(k, len(options)), replace=False)
        return [options[int(i)] for i in chosen]
