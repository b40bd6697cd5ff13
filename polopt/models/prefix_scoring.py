"""Shared-prompt scoring for transformers causal LMs: the prompt computed once through the key/value cache.

A preference pair's winner and loser share their prompt x. Scored separately, the rows
``[x, y_w]`` and ``[x, y_l]`` compute every prompt position twice. Here the prompt runs once,
with gradients, its keys and values kept in a ``transformers.DynamicCache``; the cache is then
repeated along the batch (``DynamicCache.batch_repeat_interleave(2)``: a differentiable
``repeat_interleave``, so the gradient of both responses flows back into the one prompt pass)
and the two responses continue from it in one more pass of 2B rows. By the chain rule

    log pi(y | x) = sum_{t=1..n} log pi(y_t | x, y_<t),

each response token must see exactly the prompt's tokens and its own earlier tokens at the same
positions as in a separate pass; that holds here, so the values and their gradients are those of
separate scoring up to floating-point rounding (tests/models/test_prefix_scoring.py: 1e-5 in
float32 on Llama- and GPT-2-shaped models).

How the layout is kept right with right-padded prompts of different lengths:

- the prompt pass reads ``(B, T_p)`` with pads masked out by the attention mask;
- the continuation reads the responses' tokens but their last (which is only scored, never
  read), with explicit ``position_ids = n_p + k`` (n_p: the row's real prompt length), so the
  pad slots between a short prompt and its response change no position; its attention mask is
  the prompt's mask followed by the responses' own, so no response token sees a pad slot;
- the first response token is scored by the logits at the prompt's last real token, which the
  prompt pass returns alone where the model's forward takes a per-row ``logits_to_keep``
  (the output projection then runs on B positions instead of B T_p), all of them otherwise.

This is the transformers counterpart of :func:`polopt.models.logprobs.shared_pair_logprobs`
(the tiny transformer's one-row layout with a custom attention mask) and has the same call:
right-padded token tensors and a pad id that may lie outside the vocabulary (the text path pads
with -1); pad positions are fed as id 0 and masked. ``model`` is the
transformers model itself (``AutoModelForCausalLM``, or a peft model wrapping one), not polopt's
``CausalLM`` wrapper around it. ``bench/local_lm.py`` measures the gain.
"""

from __future__ import annotations

import inspect

import torch
from torch import nn

from polopt.models.logprobs import lengths, pack, token_logprobs

Tensor = torch.Tensor


def _forward_keywords(model: nn.Module) -> set[str]:
    """The keyword arguments the causal LM's own forward names (through a peft wrapper)."""
    inner = model.get_base_model() if hasattr(model, "get_base_model") else model
    return set(inspect.signature(inner.forward).parameters)


def _cache_keyword(keywords: set[str]) -> str:
    """transformers 5 names the cache argument ``cache``; earlier versions ``past_key_values``."""
    return "cache" if "cache" in keywords else "past_key_values"


def _new_cache(model: nn.Module):
    from transformers import DynamicCache

    return DynamicCache(config=model.config)


def response_token_logprobs(logits: Tensor, response: Tensor, *, pad_id: int) -> Tensor:
    """``sum_k log softmax(logits[b, k])[response[b, k]]`` over real tokens: (B, T_r, V), (B, T_r) -> (B,).

    The log-softmax runs in at least float32 (its sum over the vocabulary needs the precision)."""
    logp = torch.log_softmax(logits.to(torch.promote_types(logits.dtype, torch.float32)), dim=-1)  # (B, T_r, V)
    real = response != pad_id  # (B, T_r)
    picked = logp.gather(-1, torch.where(real, response, 0)[..., None]).squeeze(-1)  # (B, T_r)
    return torch.where(real, picked, 0.0).sum(dim=1)  # (B,)


def _interleave(winner: Tensor, loser: Tensor, *, pad_id: int) -> Tensor:
    """Rows w_0, l_0, w_1, l_1, ...: (B, T_w), (B, T_l) -> (2B, T_r), right-padded to the wider."""
    width = max(winner.shape[1], loser.shape[1], 1)
    w, lo = (nn.functional.pad(t, (0, width - t.shape[1]), value=pad_id) for t in (winner, loser))  # (B, T_r)
    return torch.stack([w, lo], dim=1).flatten(0, 1)  # (2B, T_r)


def _prompt_pass(model: nn.Module, prompt: Tensor, keywords: set[str], *, pad_id: int):
    """Run the prompt once into a new cache; return (cache, logits at each row's last prompt token (B, 1, V),
    prompt mask (B, T_p), prompt lengths (B,))."""
    real = prompt != pad_id  # (B, T_p)
    n_p = real.sum(dim=1)  # (B,)
    if bool((n_p < 1).any()):
        raise ValueError("every prompt needs at least one token (the first response token is scored "
                         "by the logits at the prompt's last token)")
    cache = _new_cache(model)
    last = (n_p - 1)[:, None]  # (B, 1) index of the last real prompt token
    positions = torch.arange(prompt.shape[1], device=prompt.device).expand(len(prompt), -1)  # (B, T_p)
    # the last k positions hold every row's last prompt token; an integer keeps the same meaning in every
    # transformers release that takes logits_to_keep (a tensor of indices is read differently across them)
    k = int(prompt.shape[1] - int(last.min()))
    keep = {"logits_to_keep": k} if "logits_to_keep" in keywords else {}
    out = model(input_ids=torch.where(real, prompt, 0), attention_mask=real.long(), position_ids=positions,
                use_cache=True, **{_cache_keyword(keywords): cache}, **keep)
    logits = out.logits  # (B, k, V) with logits_to_keep, else (B, T_p, V)
    offset = prompt.shape[1] - logits.shape[1]  # the position of the first kept column
    logits = logits.gather(1, (last - offset)[..., None].expand(-1, -1, logits.shape[-1]))  # (B, 1, V)
    return cache, logits, real, n_p


def prompt_cached_pair_logprobs(model: nn.Module, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                                pad_id: int) -> tuple[Tensor, Tensor]:
    """``log pi(winner | prompt)`` and ``log pi(loser | prompt)``, (B,) each, the prompt computed once.

    Args:
        model: a transformers causal LM (or a peft model around one) whose forward takes
            ``attention_mask``, ``position_ids`` and a ``DynamicCache``.
        prompt: (B, T_p) right-padded prompt ids; every prompt has at least one token.
        winner, loser: (B, T_w), (B, T_l) right-padded response ids (empty rows allowed).
        pad_id: the padding id of the three tensors (any integer; -1 on the text path).

    Returns:
        The two sums of next-token log-probabilities over the response ids, with gradients.
    """
    if not prompt.shape[0] == winner.shape[0] == loser.shape[0]:
        raise ValueError(f"prompt, winner and loser batches differ: {prompt.shape[0]}, {winner.shape[0]} and "
                         f"{loser.shape[0]} rows")
    keywords = _forward_keywords(model)
    cache, first, prompt_real, n_p = _prompt_pass(model, prompt, keywords, pad_id=pad_id)
    responses = _interleave(winner, loser, pad_id=pad_id)  # (2B, T_r)
    logits = first.repeat_interleave(2, dim=0)  # (2B, 1, V): scores each response's first token
    reads = responses[:, :-1]  # (2B, T_r - 1): the last token is only scored
    if reads.shape[1] > 0 and bool((reads != pad_id).any()):
        cache.batch_repeat_interleave(2)  # (2B, heads, T_p, d) per layer, differentiably
        real = reads != pad_id  # (2B, T_r - 1)
        mask = torch.cat([prompt_real.repeat_interleave(2, dim=0), real], dim=1).long()  # (2B, T_p + T_r - 1)
        k = torch.arange(reads.shape[1], device=prompt.device)[None, :]  # (1, T_r - 1)
        positions = n_p.repeat_interleave(2)[:, None] + k  # (2B, T_r - 1): right after each row's own prompt
        out = model(input_ids=torch.where(real, reads, 0), attention_mask=mask, position_ids=positions,
                    use_cache=True, **{_cache_keyword(keywords): cache})
        logits = torch.cat([logits, out.logits], dim=1)  # (2B, T_r, V)
    # without the continuation, the columns past the first hold padding only (every response has <= 1 token)
    both = response_token_logprobs(logits, responses[:, : logits.shape[1]], pad_id=pad_id)  # (2B,)
    pair = both.view(-1, 2)  # (B, 2)
    return pair[:, 0], pair[:, 1]


def separate_pair_logprobs(model: nn.Module, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                           pad_id: int) -> tuple[Tensor, Tensor]:
    """The baseline: ``[prompt, winner]`` and ``[prompt, loser]`` as separate rows of one forward pass, packed
    and masked by :func:`polopt.models.logprobs.pack` (the path of the trainer's ``SequencePolicy``). (B,) each."""
    width = max(winner.shape[1], loser.shape[1], 1)
    responses = torch.cat([nn.functional.pad(t, (0, width - t.shape[1]), value=pad_id)
                           for t in (winner, loser)])  # (2B, T_r): winners, then losers
    tokens, in_response = pack(torch.cat([prompt, prompt]), responses, pad_id=pad_id)  # (2B, T) each
    real = tokens != pad_id  # (2B, T)

    def logits(rows: Tensor) -> Tensor:  # (2B, T - 1) -> (2B, T - 1, V); pads fed as id 0 and masked
        return model(input_ids=torch.where(real[:, :-1], rows, 0), attention_mask=real[:, :-1].long()).logits

    both = token_logprobs(logits, tokens, in_response).sum(dim=1)  # (2B,)
    return both[: len(prompt)], both[len(prompt):]


def prompt_share(prompt: Tensor, winner: Tensor, loser: Tensor, *, pad_id: int) -> float:
    """The share of the positions of separate scoring that shared-prompt scoring skips:
    ``sum n_p / sum (2 n_p + n_w + n_l)`` over real tokens (one of the two copies of each prompt)."""
    n_p = lengths(prompt, pad_id=pad_id).sum()
    total = 2 * n_p + lengths(winner, pad_id=pad_id).sum() + lengths(loser, pad_id=pad_id).sum()
    return float(n_p / total) if total > 0 else 0.0
