"""A Bradley–Terry reward model on a local causal LM: a linear scalar head on its last hidden state.

``r(x, y) = w . h(x, y) + b``, where ``h(x, y)`` (H,) is the model's last hidden state (the output of
its final layer and norm, transformers' ``base_model(...).last_hidden_state``) at the last real token
of prompt + response, the ids of :mod:`polopt.data.chat`'s token convention (plain rows end their
response with the end token, chat rows are rendered by the chat template). Reading a sequence's score
at its last token is common practice for sequence reward models.

The body is frozen: only ``w`` (H,) and ``b`` train, so each pair's two hidden states are computed
once, without gradients (:func:`hidden_features`), and the fit (:func:`fit_head`) is maximum likelihood
of Bradley–Terry, ``P(y_w > y_l | x) = sigmoid(r(x, y_w) - r(x, y_l))`` (Bradley & Terry, Rank analysis
of incomplete block designs, 1952), on those features: a logistic regression on feature differences,
convex in ``w`` (the bias cancels in every difference). Fine-tuning the body too would cost a forward
and backward pass of the whole model per step.

The file (:func:`polopt.methods.reward_model.save_reward_model`, kind ``local_lm``) holds the head
only; its identity names the model folder, a SHA-256 of its safetensors weights, the hidden width,
the vocabulary size and the context, so a file is refused for another model (:func:`load_lm_reward`).
"""

from __future__ import annotations

from pathlib import Path

import torch
from torch import nn
from torch.nn.utils.rnn import pad_sequence

from polopt.checkpoints.files import file_sha256
from polopt.data.chat import RowProblem, check_tokenizer, is_chat_row, pair_ids
from polopt.methods.reward_model import bradley_terry_nll, load_reward_model
from polopt.models.local_lm import PAD, load_model, load_tokenizer, model_folder
from polopt.models.logprobs import pack

Tensor = torch.Tensor
KIND = "local_lm"
FEATURE_BATCH = 64  # rows per forward pass of the frozen body


def weights_digest(path) -> str:
    """SHA-256 over the folder's safetensors files (sorted by name): which weights the head was fitted on."""
    files = sorted(Path(model_folder(path)).glob("*.safetensors"))
    return "+".join(file_sha256(f) for f in files)


def pad_rows(rows: list[list[int]]) -> Tensor:
    """Id lists as one right-padded (N, T) tensor, padding :data:`polopt.models.local_lm.PAD`."""
    return pad_sequence([torch.as_tensor(r, dtype=torch.long) for r in rows], batch_first=True, padding_value=PAD)


def hidden_features(model: nn.Module, prompt: Tensor, response: Tensor, *, batch: int = FEATURE_BATCH) -> Tensor:
    """The last hidden state at the last real token of prompt + response, without gradients.

    ``model``: a transformers causal LM; ``prompt`` (N, T_p), ``response`` (N, T_r) right-padded with
    :data:`PAD`. Returns (N, H).
    """
    out = []
    with torch.no_grad():
        for i in range(0, len(prompt), batch):
            tokens, _ = pack(prompt[i:i + batch], response[i:i + batch], pad_id=PAD)  # (B, T)
            real = tokens != PAD  # (B, T)
            last = real.sum(dim=1) - 1  # (B,) index of the last real token (right padding)
            hidden = model.base_model(input_ids=torch.where(real, tokens, 0),
                                      attention_mask=real.long()).last_hidden_state  # (B, T, H)
            out.append(hidden[torch.arange(len(tokens)), last])  # (B, H)
    return torch.cat(out).float()  # (N, H)


def new_head(width: int, *, seed: int = 0) -> nn.Linear:
    """The scalar head ``H -> 1``, started by torch's default initialisation under ``seed``."""
    with torch.random.fork_rng():
        torch.manual_seed(seed)
        return nn.Linear(width, 1)


def pair_loss(head: nn.Linear, winner: Tensor, loser: Tensor, *, l2: float = 0.0) -> Tensor:
    """Bradley–Terry negative log-likelihood of pairs of features, ``-mean log sigmoid(r_w - r_l)``
    (Bradley & Terry 1952), plus ``l2/2 ||w||^2`` where given. ``winner``, ``loser`` (B, H) -> scalar."""
    margin = head(winner).squeeze(-1) - head(loser).squeeze(-1)  # (B,) r_w - r_l
    loss = bradley_terry_nll(margin)
    return loss + 0.5 * l2 * (head.weight**2).sum() if l2 > 0 else loss


def fit_head(head: nn.Linear, winner: Tensor, loser: Tensor, *, steps: int, lr: float, l2: float = 0.0,
             batch_size: int | None = 256, seed: int = 0) -> list[float]:
    """Maximum likelihood of the head by Adam on features ``winner``, ``loser`` (N, H); the loss per step."""
    optimiser = torch.optim.Adam(head.parameters(), lr=lr)
    generator = torch.Generator().manual_seed(seed)
    history = []
    for _ in range(steps):
        index = torch.randperm(len(winner), generator=generator)[: batch_size or len(winner)]  # (B,)
        loss = pair_loss(head, winner[index], loser[index], l2=l2)
        optimiser.zero_grad()
        loss.backward()
        optimiser.step()
        history.append(float(loss.detach()))
    return history


class LMReward(nn.Module):
    """r(x, y) of token rows: the frozen causal LM's last hidden state through the scalar head.

    ``forward(prompt (B, T_p), response (B, T_r)) -> (B,)``, both right-padded with :data:`PAD`.
    """

    def __init__(self, model: nn.Module, head: nn.Linear):
        super().__init__()
        self.body = model.requires_grad_(False).eval()
        self.head = head

    def forward(self, prompt: Tensor, response: Tensor) -> Tensor:
        return self.head(hidden_features(self.body, prompt, response)).squeeze(-1)  # (B,)


def lm_identity(path, *, vocab_size: int, hidden_size: int, context: int, file: str | None = None) -> dict:
    """What a local-LM reward model must match: its model folder and weights, width, vocabulary, context
    (and, when fitting, the pair file)."""
    found = {"task": "pairs", "model": str(Path(path)), "weights": weights_digest(path), "vocab_size": vocab_size,
             "hidden_size": hidden_size, "context": context}
    return found if file is None else {**found, "path": file}


def load_lm_reward(path, *, key: str = "evaluate.reward") -> tuple[LMReward, object, int]:
    """The reward model in ``path`` (written by ``polopt reward task=pairs model=local_lm``), its tokenizer
    (with the chat template it was fitted with) and context; refused in one line where its model folder no
    longer holds the weights it was fitted on."""
    data = load_reward_model(path, {}, key=key)
    if data["kind"] != KIND:
        raise ValueError(f"{key}: {path} holds a reward model of kind {data['kind']!r}, not {KIND!r}")
    identity = data["identity"]
    body = load_model(identity["model"], field=f"{key} (its model folder)")
    load_reward_model(path, lm_identity(identity["model"], vocab_size=body.config.vocab_size,
                                        hidden_size=body.config.hidden_size, context=identity["context"]), key=key)
    tokenizer = load_tokenizer(identity["model"], field=f"{key} (its model folder)")
    if data.get("chat_template") is not None:
        tokenizer.chat_template = data["chat_template"]
    head = nn.Linear(body.config.hidden_size, 1)
    head.load_state_dict(data["state"]["head"])
    return LMReward(body, head), tokenizer, int(identity["context"])


def text_scores(reward: LMReward, tokenizer, context: int, prompts: list, responses: list[str]) -> tuple[list, list]:
    """r(x, y) of text rows (a prompt a string or messages) by the token convention, and the rows whose
    response was cut on the right to fit ``context``."""
    chat = [is_chat_row(x, y) for x, y in zip(prompts, responses, strict=True)]
    check_tokenizer(tokenizer, chat=any(chat), plain=not all(chat))
    rows, cut = [], []
    for i, (x, y) in enumerate(zip(prompts, responses, strict=True)):
        try:
            p, r, _ = pair_ids(tokenizer, x, y, y)
        except RowProblem as problem:
            raise ValueError(f"evaluate.reward: row {i} cannot be scored by the reward model: {problem}") from None
        room = context - len(p)  # the response is cut on the right to fit beside its prompt
        if room < 1:
            raise ValueError(f"evaluate.reward: prompt {i} has {len(p)} tokens, more than the reward model's context "
                             f"({context}) holds with a response")
        rows.append((p, r[:room]))
        if len(r) > room:
            cut.append(i)
    scores = reward(pad_rows([p for p, _ in rows]), pad_rows([r for _, r in rows]))  # (N,)
    return scores.tolist(), cut
