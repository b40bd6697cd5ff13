"""The walk-through's invented world: the weather-station bot of Tern Island.

Everything here is made up and generated from a seed: four weather stations on
a fictional island, their current readings (wind in knots, rain in mm,
temperature in degrees C), questions people ask the station bot, the replies a
bot might give, a hidden ground-truth reward over replies, and a simulated
judge with a position bias. Owns:

- :class:`Scenario`: the stations' readings, the prompts, the SFT corpus (a mix
  of good and poor replies, as real instruction data are), and :meth:`Scenario.reward`,
  the ground truth: any text can be scored, garbled samples included;
- :class:`PositionBiasedJudge`: with probability ``bias`` it picks whichever
  reply it was shown first; otherwise it votes by Bradley–Terry on the hidden
  reward, ``P(a > b) = sigmoid(r(a) - r(b))`` (Bradley and Terry, 1952), which
  is the annotator noise.

Run it to write the files by hand: ``python -m polopt.demo.scenario OUT``
writes ``OUT/sft.jsonl`` (for ``polopt sft``) and ``OUT/pairs.jsonl`` (pairs of
corpus replies labelled by the judge, for ``polopt train task=pairs``).
"""

from __future__ import annotations

import argparse
import json
import math
import random
import re
from dataclasses import dataclass
from pathlib import Path

STATIONS = ("Gull Rock", "Kelp Bay", "Old Mill", "North Pier")
QUANTITIES = {  # name -> (unit, low, high, vague reply)
    "wind": ("knots", 4, 28, "Looks windy today."),
    "rain": ("mm", 0, 14, "Some rain, maybe."),
    "temp": ("C", 3, 19, "Mild out there."),
}
QUESTIONS = ("{q} at {s}?", "{s} {q} now?")
REFUSAL = "Ask me later."
# the SFT corpus' mix of reply styles: (style, probability)
STYLES = (("exact", 0.2), ("no_station", 0.25), ("vague", 0.25), ("wrong_station", 0.15), ("refusal", 0.15))

# the hidden reward's terms
R_STATION, R_OTHER_STATION, R_READING, R_LATER, R_LENGTH, LENGTH_FREE = 2.0, -2.0, 1.5, -1.0, -0.05, 30


@dataclass(frozen=True)
class Prompt:
    text: str
    station: str
    quantity: str


class Scenario:
    """The island's readings and questions, drawn from ``seed``; see the module docstring."""

    def __init__(self, seed: int = 0):
        rng = random.Random(seed)
        self.readings = {(s, q): rng.randint(lo, hi) for s in STATIONS for q, (_, lo, hi, _) in QUANTITIES.items()}
        self.prompts = [Prompt(form.format(q=q, s=s), s, q) for s in STATIONS for q in QUANTITIES
                        for form in QUESTIONS]
        self._by_text = {p.text: p for p in self.prompts}

    def reading(self, station: str, quantity: str) -> str:
        return f"{self.readings[station, quantity]} {QUANTITIES[quantity][0]}"

    def reply(self, prompt: Prompt, style: str, rng: random.Random) -> str:
        """One reply of ``style`` (see :data:`STYLES`) to ``prompt``."""
        q = prompt.quantity
        if style == "exact":
            return f"{prompt.station}: {q} {self.reading(prompt.station, q)}."
        if style == "no_station":
            return f"{q.capitalize()} is {self.reading(prompt.station, q)}."
        if style == "vague":
            return QUANTITIES[q][3]
        if style == "wrong_station":
            other = rng.choice([s for s in STATIONS if s != prompt.station])
            return f"{other}: {q} {self.reading(other, q)}."
        if style == "refusal":
            return REFUSAL
        raise ValueError(f"style must be one of {', '.join(s for s, _ in STYLES)}, got {style!r}")

    def sft_corpus(self, n: int, seed: int = 0) -> list[tuple[str, str]]:
        """``n`` (prompt, reply) examples, prompts uniform, styles drawn from :data:`STYLES`."""
        rng = random.Random(seed)
        styles, weights = zip(*STYLES, strict=True)
        out = []
        for _ in range(n):
            prompt = rng.choice(self.prompts)
            out.append((prompt.text, self.reply(prompt, rng.choices(styles, weights)[0], rng)))
        return out

    def reward(self, prompt: str, response: str) -> float:
        """The hidden ground truth: +2 for naming the asked station, -2 for naming another, +1.5 for
        the right reading with its unit, -1 for putting the asker off, -0.05 a character beyond 30."""
        p = self._by_text[prompt]
        named = {s for s in STATIONS if s.lower() in response.lower()}
        value = R_STATION * (p.station in named) + R_OTHER_STATION * bool(named - {p.station})
        reading = self.reading(p.station, p.quantity)
        if re.search(rf"(?<!\d){re.escape(reading)}\b", response):
            value += R_READING
        if "later" in response.lower():
            value += R_LATER
        return value + R_LENGTH * max(0, len(response) - LENGTH_FREE)


def sigmoid(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x)) if x >= 0 else math.exp(x) / (1.0 + math.exp(x))


@dataclass(frozen=True)
class PositionBiasedJudge:
    """Votes between two replies shown in an order; see the module docstring."""

    scenario: Scenario
    bias: float = 0.3  # probability of picking the first-shown reply whatever it says

    def __post_init__(self):
        if not 0.0 <= self.bias < 1.0:
            raise ValueError(f"judge bias must lie in [0, 1), got {self.bias!r}")

    def prefers_first(self, prompt: str, first: str, second: str) -> float:
        """P(the judge picks ``first``) = bias + (1 - bias) sigmoid(r(first) - r(second))."""
        r1, r2 = self.scenario.reward(prompt, first), self.scenario.reward(prompt, second)
        return self.bias + (1.0 - self.bias) * sigmoid(r1 - r2)

    def vote(self, prompt: str, first: str, second: str, rng: random.Random) -> bool:
        """One vote: True when the judge picks ``first``."""
        return rng.random() < self.prefers_first(prompt, first, second)

    def label(self, prompt: str, a: str, b: str, rng: random.Random) -> dict:
        """A labelled pair: a and b shown in a random order, the judge's pick is the winner."""
        first, second = (a, b) if rng.random() < 0.5 else (b, a)
        picked_first = self.vote(prompt, first, second, rng)
        winner, loser = (first, second) if picked_first else (second, first)
        return {"prompt": prompt, "winner": winner, "loser": loser, "shown_first": "winner" if picked_first
                else "loser"}


def write_files(out: Path, *, n_sft: int = 2000, n_pairs: int = 500, bias: float = 0.3, seed: int = 0) -> dict:
    """``sft.jsonl`` (prompt, response) and ``pairs.jsonl`` (judge-labelled pairs of corpus replies)."""
    scenario = Scenario(seed)
    judge = PositionBiasedJudge(scenario, bias)
    out.mkdir(parents=True, exist_ok=True)
    corpus = scenario.sft_corpus(n_sft, seed)
    with (out / "sft.jsonl").open("w", encoding="utf-8") as f:
        for prompt, response in corpus:
            f.write(json.dumps({"prompt": prompt, "response": response}) + "\n")
    rng = random.Random(seed + 1)
    styles, weights = zip(*STYLES, strict=True)
    with (out / "pairs.jsonl").open("w", encoding="utf-8") as f:
        for _ in range(n_pairs):
            p = rng.choice(scenario.prompts)
            a, b = (scenario.reply(p, rng.choices(styles, weights)[0], rng) for _ in range(2))
            f.write(json.dumps(judge.label(p.text, a, b, rng)) + "\n")
    return {"sft": out / "sft.jsonl", "pairs": out / "pairs.jsonl"}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write the Tern Island weather-bot files: sft.jsonl and "
                                                 "pairs.jsonl (pairs labelled by the position-biased judge).")
    parser.add_argument("out", type=Path, help="folder to write into")
    parser.add_argument("--sft", type=int, default=2000, help="SFT examples (default %(default)s)")
    parser.add_argument("--pairs", type=int, default=500, help="labelled pairs (default %(default)s)")
    parser.add_argument("--bias", type=float, default=0.3, help="the judge's position bias (default %(default)s)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    files = write_files(args.out, n_sft=args.sft, n_pairs=args.pairs, bias=args.bias, seed=args.seed)
    print(f"wrote {files['sft']} and {files['pairs']} (identical replies in a pair are left in: "
          "polopt data reports them as rejects)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
