"""What scores a sampled response in ``polopt evaluate``: a user's function, or a reward model file.

A scorer maps rows ``(prompt, response)`` to real numbers; only the order of the two scores of one
prompt matters (the policy's response against the reference's). Two kinds:

- ``evaluate.scorer=pkg.module:fn``: the user's ``fn(prompt, response) -> float``, imported by
  :func:`polopt.losses.registry.import_dotted` (the one place polopt imports by a name read at run
  time). ``prompt`` is the prompt as the file holds it (a string, or a list of messages),
  ``response`` the sampled text. A function that cannot be called with two positional arguments
  is refused before anything is sampled; a value that is not a finite real number is refused
  naming the row.
- ``evaluate.reward=PATH``: a ``reward.pt`` written by ``polopt reward task=pairs`` (a
  Bradley–Terry scalar head on the tiny transformer, :class:`polopt.methods.reward_model.ScalarRewardModel`),
  read with ``torch.load(weights_only=True)`` by :func:`polopt.methods.reward_model.load_reward_model`.
  Text is encoded as its pair file was, with the tokenizer its file names (``bos + prompt``,
  ``response + eos``); a response that does not fit the head's context beside its prompt is cut on
  the right to fit (counted in ``cut``); finite-task reward tables score response indices, not text,
  and are refused. A reward model of ``polopt reward task=pairs model=local_lm`` (a head on a local causal
  LM, :mod:`polopt.methods.lm_reward`) encodes text by the token convention of :mod:`polopt.data.chat`
  with its model's tokenizer (message prompts included), the response cut on the right to fit the
  context it was fitted with.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import torch

from polopt.data.encoding import SequenceIds, encode_prompts, encode_responses
from polopt.data.tokenizer import load_tokenizer
from polopt.losses.registry import import_dotted
from polopt.methods.lm_reward import KIND as LM_KIND
from polopt.methods.lm_reward import load_lm_reward, text_scores
from polopt.methods.reward_model import ScalarRewardModel, load_reward_model, score

SIGNATURE = "a function of (prompt, response) -> float"


@dataclass
class Scorer:
    """``scores(prompts, responses) -> list[float]``, what it is (``name``), and rows cut to fit (``cut``)."""

    name: str
    scores: Callable[[list, list[str]], list[float]]
    cut: list[int] = field(default_factory=list)


def user_scorer(path: str) -> Scorer:
    """``evaluate.scorer=pkg.module:fn`` as a :class:`Scorer` (see the module docstring)."""
    fn = import_dotted(path, field="evaluate.scorer", takes=SIGNATURE)
    try:
        inspect.signature(fn).bind("prompt", "response")
    except TypeError:
        raise TypeError(f"evaluate.scorer {path!r} must be {SIGNATURE}; it takes {inspect.signature(fn)}") from None
    except ValueError:  # no signature to read (some builtins): its first call says
        pass

    def scores(prompts: list, responses: list[str]) -> list[float]:
        out = []
        for i, (x, y) in enumerate(zip(prompts, responses, strict=True)):
            value = fn(x, y)
            if isinstance(value, bool) or not isinstance(value, (int, float)) and not hasattr(value, "__float__"):
                raise TypeError(f"evaluate.scorer {path!r} must return a real number; for prompt {i} it returned "
                                f"{type(value).__name__} {value!r:.40}")
            if not math.isfinite(float(value)):
                raise ValueError(f"evaluate.scorer {path!r} returned {float(value)} for prompt {i}; scores must be "
                                 "finite")
            out.append(float(value))
        return out

    return Scorer(path, scores)


def _reward_head(path: str) -> tuple[ScalarRewardModel, object, SequenceIds, int]:
    """The scalar head of a pair-file reward model, its tokenizer, special ids and context."""
    data = load_reward_model(path, {}, key="evaluate.reward")
    identity = data.get("identity", {})
    if data["kind"] != "transformer" or identity.get("task") != "pairs":
        raise ValueError(f"evaluate.reward: {path} was fitted on task {identity.get('task')!r} ({data['kind']}), which "
                         "scores that task's responses, not text; give a reward model fitted to a pair file "
                         "(polopt reward task=pairs task.path=FILE) or evaluate.scorer=pkg.module:fn")
    tokenizer = load_tokenizer(identity["tokenizer"])
    ids = SequenceIds.for_tokenizer(tokenizer)
    if (ids.vocab_size, ids.pad) != (identity["vocab_size"], identity["pad"]):
        raise ValueError(f"evaluate.reward: {path} was fitted with tokenizer {identity['tokenizer']!r} of "
                         f"{identity['vocab_size']} ids, which now gives {ids.vocab_size}; refit it")
    head = ScalarRewardModel(ids.vocab_size, pad_id=ids.pad, context=identity["context"], width=identity["width"],
                             layers=identity["layers"], heads=identity["heads"])
    head.load_state_dict(data["state"]["model"])
    return head.eval(), tokenizer, ids, int(identity["context"])


def lm_reward_scorer(path: str) -> Scorer:
    """``evaluate.reward=PATH`` of a reward model on a local causal LM (:mod:`polopt.methods.lm_reward`)."""
    reward, tokenizer, context = load_lm_reward(path)
    cut: list[int] = []

    def scores(prompts: list, responses: list[str]) -> list[float]:
        values, cut_now = text_scores(reward, tokenizer, context, prompts, responses)
        cut.extend(cut_now)
        return values

    return Scorer(f"reward model {path}", scores, cut)


def reward_scorer(path: str) -> Scorer:
    """``evaluate.reward=PATH`` as a :class:`Scorer` (see the module docstring)."""
    if load_reward_model(path, {}, key="evaluate.reward")["kind"] == LM_KIND:
        return lm_reward_scorer(path)
    head, tokenizer, ids, context = _reward_head(path)
    cut: list[int] = []

    def scores(prompts: list, responses: list[str]) -> list[float]:
        texts = []
        for i, x in enumerate(prompts):
            if not isinstance(x, str):
                raise ValueError(f"evaluate.reward scores plain-text prompts (a pair-file reward model reads text); "
                                 f"prompt {i} is a list of messages: give evaluate.scorer=pkg.module:fn instead")
            room = context - 2 - len(tokenizer.encode(x))  # bos + prompt + response + eos within the context
            if room < 0:
                raise ValueError(f"evaluate.reward: prompt {i} has {len(tokenizer.encode(x))} tokens, more than the "
                                 f"reward model's context ({context}) holds with a response")
            y = responses[i]
            if len(tokenizer.encode(y)) > room:
                y = tokenizer.truncate(y, room)
                cut.append(i)
            texts.append(y)
        prompt = encode_prompts(tokenizer, list(prompts), ids)  # (N, T_p)
        response = encode_responses(tokenizer, texts, ids)  # (N, T_r)
        return score(head, prompt, response).tolist()

    return Scorer(f"reward model {path}", scores, cut)


def build_scorer(scorer: str | None, reward: str | None) -> Scorer:
    """Exactly one of ``evaluate.scorer`` and ``evaluate.reward``, as a :class:`Scorer`."""
    if (scorer is None) == (reward is None):
        given = "both" if scorer is not None else "neither"
        raise ValueError(f"polopt evaluate needs exactly one of evaluate.scorer=pkg.module:fn ({SIGNATURE}) and "
                         f"evaluate.reward=PATH (a reward.pt of polopt reward task=pairs); {given} was given")
    return user_scorer(str(scorer)) if scorer is not None else reward_scorer(str(reward))


def score_rows(scorer: Scorer, prompts: list, responses: list[str]) -> list[float]:
    """``scorer.scores`` of the rows, under no gradient."""
    with torch.no_grad():
        return scorer.scores(prompts, responses)
