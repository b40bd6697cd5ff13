"""Drawing responses from a sequence model, and the Monte-Carlo KL between two models.

Owns :func:`sample_responses` (ancestral sampling, one token at a time with
``torch.multinomial`` on the model's next-token distribution, until the end id
or a length limit) and :func:`kl_estimate`, the Monte-Carlo estimate

    KL(pi || pi_ref) = E_{y ~ pi} [log pi(y | x) - log pi_ref(y | x)]

from responses sampled from pi (the mean of the sampled log-ratios, with its
standard error). Padding and the start id are never drawn (their mass under a
trained model is negligible, and a pad inside a response would end it for
:func:`polopt.models.logprobs.pack`); so the samples follow the model's distribution
renormalised over the other ids.
"""

from __future__ import annotations

import math

import torch
from torch import nn
from tqdm.auto import tqdm

from polopt.data.encoding import SequenceIds, pad_rows
from polopt.models.logprobs import batched_logprobs

Tensor = torch.Tensor


@torch.no_grad()
def sample_responses(model: nn.Module, prompt: Tensor, *, ids: SequenceIds, max_new_tokens: int,
                     generator: torch.Generator, batch_size: int = 512, progress: bool = False,
                     desc: str = "sampling") -> tuple[list[list[int]], Tensor]:
    """One response per prompt row: the token ids (the end id included where drawn) and whether
    each response ended by itself (N,) rather than at ``max_new_tokens``.

    prompt (N, T_p) right-padded with ``ids.pad``. The model must hold
    ``T_p + max_new_tokens - 1`` input positions.
    """
    was_training = model.training
    model.eval()
    rows, ended = [], []
    for start in tqdm(range(0, len(prompt), batch_size), desc=desc, disable=not progress, leave=False):
        r, e = _sample_batch(model, prompt[start:start + batch_size], ids=ids, max_new_tokens=max_new_tokens,
                             generator=generator)
        rows += r
        ended.append(e)
    model.train(was_training)
    return rows, torch.cat(ended) if ended else torch.zeros(0, dtype=torch.bool)


def _sample_batch(model, prompt: Tensor, *, ids: SequenceIds, max_new_tokens: int, generator: torch.Generator):
    n = len(prompt)
    n_prompt = (prompt != ids.pad).sum(1)  # (N,)
    seq = torch.full((n, prompt.shape[1] + max_new_tokens), ids.pad, dtype=torch.long)  # (N, T_p + L)
    seq[:, :prompt.shape[1]] = prompt
    length = n_prompt.clone()  # (N,) tokens so far
    done = torch.zeros(n, dtype=torch.bool)  # (N,)
    rows = torch.arange(n)
    for _ in range(max_new_tokens):
        logits = model(seq[:, :int(length.max())])  # (N, T, V)
        last = logits[rows, length - 1].float()  # (N, V): the next-token logits of each row
        last[:, [ids.pad, ids.bos]] = -math.inf  # never drawn: see the module docstring
        token = torch.multinomial(torch.softmax(last, dim=-1), 1, generator=generator).squeeze(1)  # (N,)
        active = ~done
        seq[rows[active], length[active]] = token[active]
        length = length + active.long()
        done = done | (token == ids.eos)
        if bool(done.all()):
            break
    out = [seq[i, int(n_prompt[i]):int(length[i])].tolist() for i in range(n)]
    return out, done


def kl_estimate(policy_model: nn.Module, reference_model: nn.Module, prompt: Tensor, responses: list[list[int]], *,
                ids: SequenceIds) -> tuple[float, float]:
    """(mean, standard error) of ``log pi(y|x) - log pi_ref(y|x)`` over responses sampled from pi."""
    response = pad_rows(responses, ids)  # (N, L)
    logp = batched_logprobs(policy_model, prompt, response, pad_id=ids.pad, batch_size=512)  # (N,)
    logq = batched_logprobs(reference_model, prompt, response, pad_id=ids.pad, batch_size=512)  # (N,)
    ratio = (logp - logq).double()
    se = float(ratio.std(unbiased=True) / math.sqrt(len(ratio))) if len(ratio) > 1 else math.nan
    return float(ratio.mean()), se
