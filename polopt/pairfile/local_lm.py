"""``task=pairs model=local_lm``: a pair file trained on a local causal LM, with its own tokenizer.

The path, beside the built-in transformer's (:mod:`polopt.pairfile.task`):

1. the file is read and checked by :mod:`polopt.data` with message lists allowed (``bad_messages`` where
   a list is not a valid one); every accepted row becomes token ids by the convention of
   :mod:`polopt.data.chat` with the tokenizer of ``model.path`` (chat rows through its chat template, or
   ``task.chat_template=PATH``); rows longer than the context (``model.context``, default the model's
   own maximum, and ``task.max_length`` where given) follow ``task.truncation``; each row the model
   cannot take is a reject, so ``rows_in = rows_accepted + rows_rejected`` still holds;
2. the policy is the model of ``model.path`` (:mod:`polopt.models.local_lm`), fully fine-tuned, or with a
   LoRA adapter (``model.adapter=lora``, :mod:`polopt.models.lora`);
3. the reference is the same weights with the adapter switched off (LoRA), a frozen copy of the
   starting model, or the model of ``task.reference_checkpoint=DIR`` (another local model folder with
   the same vocabulary); its log-probabilities of every winner and loser are computed once and cached
   in the run folder (:mod:`polopt.models.reference_cache`);
4. at the end the run writes ``RUN/policy/`` with ``save_pretrained`` (the model and tokenizer, or with
   LoRA the adapter and tokenizer: ``peft.PeftModel.from_pretrained(base, RUN/policy)``), and the
   summary's statistics are computed with the final policy over every accepted pair.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from pathlib import Path

import torch

from polopt.data import PairData, read_pair_file, write_rejects
from polopt.data.chat import RowProblem, check_tokenizer, fit_ids, fit_member_ids, is_chat_row, member_ids, pair_ids
from polopt.data.encoding import SequenceIds
from polopt.data.rows import Reject
from polopt.data.validate import reject_later
from polopt.losses.margin import MarginLoss
from polopt.models.local_lm import (
    PAD,
    CausalLM,
    load_config,
    load_model,
    load_tokenizer,
    model_folder,
    positions,
    quiet_transformers,
)
from polopt.models.logprobs import SequencePolicy, real_tokens
from polopt.models.lora import ADAPTERS, LoraSettings, adapter_dropout_on, with_lora
from polopt.models.reference_cache import FILE_NAME
from polopt.pairfile.session import REJECTS_FILE, PairSession, nothing_accepted
from polopt.training.contracts import TrainResult
from polopt.training.run_folder import POLICY_DIR

Tensor = torch.Tensor


def pad_ids(rows: list[list[int]]) -> Tensor:
    """Lists of ids as a right-padded (N, T) tensor, padding :data:`polopt.models.local_lm.PAD`."""
    width = max((len(r) for r in rows), default=0)
    out = torch.full((len(rows), width), PAD, dtype=torch.long)  # (N, T)
    for i, r in enumerate(rows):
        out[i, : len(r)] = torch.as_tensor(r, dtype=torch.long)
    return out


def context_of(path, context: int | None) -> int:
    """``model.context`` checked against the model's own maximum, which it defaults to."""
    most = positions(load_config(path))
    if context is None:
        if most is None:
            raise ValueError(f"model.path {str(path)!r}: the model's config states no maximum of positions; "
                             "give model.context=N")
        return most
    if isinstance(context, bool) or not isinstance(context, int) or context < 2:
        raise ValueError(f"model.context must be an integer >= 2 or null (the model's own maximum), got {context!r}")
    if most is not None and context > most:
        raise ValueError(f"model.context must be at most the model's own maximum of {most} positions, got {context}")
    return context


def _encode_row(tokenizer, prompt, responses: list, *, kind: str, limit: int, truncation: str):
    """(ids, tokens removed per field, length) of one row: ids (prompt, winner, loser) for pairs, (prompt,
    [response ids...]) for the other kinds; a :class:`polopt.data.chat.RowProblem` where it cannot be encoded."""
    if kind == "pairs":
        p, w, lo, cut = fit_ids(*pair_ids(tokenizer, prompt, *responses), limit=limit, truncation=truncation)
        return (p, w, lo), cut, len(p) + max(len(w), len(lo))
    field = "response" if kind == "unpaired" else "responses"
    names = [field] if kind == "unpaired" else [f"responses[{k}]" for k in range(len(responses))]
    p, rs, cut = fit_member_ids(*member_ids(tokenizer, prompt, responses, names=names), limit=limit,
                                truncation=truncation, field=field)
    return (p, rs), cut, len(p) + max(map(len, rs))


def encode_rows(tokenizer, data: PairData, *, limit: int, truncation: str) -> tuple[PairData, list[tuple]]:
    """The accepted rows as ids by :mod:`polopt.data.chat`'s convention within ``limit`` tokens: (prompt, winner,
    loser) for pairs, (prompt, [ids of each response]) for the other kinds; and ``data`` with the rows that cannot
    be encoded moved to its rejects (see :func:`polopt.data.validate.reject_later`)."""
    rows = [(p, [w, lo]) for p, w, lo in zip(data.prompt, data.winner, data.loser, strict=True)] \
        if data.kind == "pairs" else list(zip(data.prompt, data.responses, strict=True))
    check_tokenizer(tokenizer, chat=any(is_chat_row(p, *rs) for p, rs in rows),
                    plain=any(not is_chat_row(p, *rs) for p, rs in rows))
    ids, rejected, cuts, measured = [], {}, {}, []
    for i, (prompt, responses) in enumerate(rows):
        try:
            row_ids, cut, length = _encode_row(tokenizer, prompt, responses, kind=data.kind, limit=limit,
                                               truncation=truncation)
        except RowProblem as problem:
            rejected[i] = Reject(0, "", problem.field, problem.reason, problem.detail)
            measured.append(0)
            continue
        ids.append(row_ids)
        cuts[i] = cut
        measured.append(length)
    name = getattr(tokenizer, "name_or_path", type(tokenizer).__name__)
    return reject_later(data, rejected, cuts, measured, tokenizer=name, max_length=limit), ids


def check_same_vocabulary(reference_path, tokenizer, config) -> None:
    """One ValueError unless the reference folder scores the same token ids as the policy's tokenizer."""
    other = load_config(reference_path, field="task.reference_checkpoint")
    mine = tokenizer.get_vocab()
    theirs = (load_tokenizer(reference_path, field="task.reference_checkpoint").get_vocab()
              if any((Path(reference_path) / f).is_file() for f in ("tokenizer.json", "tokenizer_config.json"))
              else None)
    if other.vocab_size != config.vocab_size or (theirs is not None and theirs != mine):
        raise ValueError(f"task.reference_checkpoint {str(reference_path)!r} has another vocabulary than model.path "
                         f"(vocab_size {other.vocab_size} and {config.vocab_size}"
                         f"{'' if theirs is None or theirs == mine else ', different tokens'}); the reference "
                         "must score the same token ids: give a folder saved with the policy's tokenizer")


@dataclass
class LocalLMSession(PairSession):
    """:class:`polopt.pairfile.session.PairSession` on a local causal LM (see the module docstring)."""

    model_path: str = ""
    token_ids: list | None = None  # (prompt, winner, loser) id lists of the accepted rows
    run_dir: Path | None = None
    adapter: str | None = None

    def encode(self) -> None:
        n = len(self.token_ids) if self.n_pairs is None else min(self.n_pairs, len(self.token_ids))
        prompt, winner, loser = (pad_ids([row[k] for row in self.token_ids[:n]]) for k in range(3))
        width = max(winner.shape[1], loser.shape[1])  # winners and losers share one width (one batch)
        self.prompt = prompt  # (N, T_p)
        self.winner, self.loser = (torch.nn.functional.pad(t, (0, width - t.shape[1]), value=PAD)
                                   for t in (winner, loser))  # (N, T_r) each
        self.weight = torch.tensor(self.data.weight[:n], dtype=torch.float32) if self.data.accounting["weighted"] \
            else None
        self.tokens = real_tokens(self.prompt, self.winner, pad_id=PAD) + real_tokens(self.prompt, self.loser,
                                                                                      pad_id=PAD)  # (N,)

    def build_policy(self, kind: str = "local_lm", path=None, adapter: str | None = None, lora: dict | None = None,
                     context: int | None = None, seed: int = 0) -> SequencePolicy:
        """The model of ``model.path`` as the policy (with a LoRA adapter if ``model.adapter=lora``), and the
        reference's log-probabilities of every pair (see the module docstring)."""
        del context  # read when the rows were encoded
        if kind != "local_lm" or Path(str(path)) != Path(self.model_path):
            raise ValueError(f"this session was prepared for model=local_lm model.path={self.model_path}, got "
                             f"model.kind={kind!r} model.path={path!r}")
        if adapter is not None and adapter not in ADAPTERS:
            raise ValueError(f"model.adapter must be null (full fine-tuning) or one of {', '.join(ADAPTERS)}, "
                             f"got {adapter!r}")
        settings = LoraSettings.from_config(lora)
        if adapter is None and settings != LoraSettings():
            raise ValueError("model.lora.* is read with model.adapter=lora only; without an adapter every weight "
                             "trains: give model.adapter=lora or leave model.lora at its defaults")
        model = load_model(path)
        if self.reference_path is not None:
            check_same_vocabulary(self.reference_path, self.tokenizer, model.config)
            other = load_model(self.reference_path, field="task.reference_checkpoint")
            reference = CausalLM(other.requires_grad_(False))
        elif adapter is None:
            reference = CausalLM(copy.deepcopy(model).requires_grad_(False))  # the frozen starting model
        if adapter == "lora":
            model = with_lora(model, settings, seed=seed)
            if self.reference_path is None:
                reference = CausalLM(model, adapter_off=True)  # the same weights, adapter off: one base copy
        self.adapter = adapter
        self.attach_reference(reference)
        if adapter == "lora":
            adapter_dropout_on(model, settings)  # after the reference pass, which ran in eval mode
        return SequencePolicy(CausalLM(model), pad_id=PAD)

    def save_pretrained(self, policy: SequencePolicy, directory: Path) -> None:
        """``RUN/policy/``: the trained model (or its LoRA adapter) and the tokenizer, by ``save_pretrained``."""
        with quiet_transformers():
            policy.model.model.save_pretrained(directory)
            self.tokenizer.save_pretrained(directory)

    def summarise(self, policy, result: TrainResult) -> dict:
        summary = super().summarise(policy, result)
        trainable = sum(p.numel() for p in policy.parameters() if p.requires_grad)
        summary["model"] = {"path": self.model_path, "adapter": self.adapter, "trainable_parameters": trainable,
                            "parameters": sum(p.numel() for p in policy.parameters())}
        summary["saved_policy"] = None if self.run_dir is None else str(self.run_dir / POLICY_DIR)
        return summary

    def table(self, summary: dict) -> str:
        m = summary["model"]
        how = "LoRA" if m["adapter"] == "lora" else "full fine-tuning"
        lines = [super().table(summary), f"model: {m['path']} ({how}: {m['trainable_parameters']:,} of "
                                         f"{m['parameters']:,} parameters trained)"]
        if summary["saved_policy"] is not None:
            lines.append(f"policy saved with save_pretrained: {summary['saved_policy']}")
        return "\n".join(lines)


def prepare_local_lm(task, loss: MarginLoss, *, model: dict, beta: float, smoothing: float, n_pairs: int | None,
                     run_dir: str | Path | None, grouped=None) -> LocalLMSession:
    """The session of ``task`` (a :class:`polopt.pairfile.task.PairTask`) on ``model`` (the ``model`` config,
    ``kind: local_lm``): the file read and encoded with the model's tokenizer (see the module docstring).
    ``grouped(kind, loss)``: (a session class, the group objective) where the file's rows train as groups
    (:func:`polopt.pairfile.group_session.grouped`), None for pairs."""
    spec = task.file
    if task.stream:
        raise ValueError("task.stream=true streams pairs for model=transformer; model=local_lm reads the file in "
                         "memory: set task.stream=false")
    if task.reference is not None:
        model_folder(task.reference, field="task.reference_checkpoint")
    data, token_ids, tokenizer = read_for_model(spec, path=model.get("path"), context=model.get("context"),
                                                chat_template=task.chat_template)
    session_type, extra = LocalLMSession, {}
    if grouped is not None and (choice := grouped(data.kind, loss)) is not None:
        session_type, loss = choice
        extra = {"feedback": data.kind}
    path = str(model_folder(model.get("path")))
    rejects = None if run_dir is None else write_rejects(data.rejects, Path(run_dir) / REJECTS_FILE)
    if len(data) == 0:
        raise nothing_accepted(spec.path, data, rejects)
    cache = Path(run_dir) / FILE_NAME if run_dir is not None and task.cache_reference else None
    special = SequenceIds(PAD, tokenizer.bos_token_id, tokenizer.eos_token_id, len(tokenizer))
    session = session_type(data=data, tokenizer=tokenizer, file_tokenizer=path, ids=special, loss=loss,
                             beta=beta, smoothing=smoothing, n_pairs=n_pairs, reference_path=task.reference,
                             reference_model=None, reference_meta=None, cache=cache, rejects_path=rejects,
                             model_path=path, token_ids=token_ids, run_dir=None if run_dir is None else Path(run_dir),
                             **extra)
    session.encode()
    return session


def read_for_model(spec, *, path, context: int | None = None,
                   chat_template: str | None = None) -> tuple[PairData, list[tuple], object]:
    """The pair file of ``spec`` (a :class:`polopt.data.PairFileSpec`) read for the local model in ``path``:
    the checked rows, their ids by the token convention within the context (``context``, default the model's
    own maximum, and ``spec.max_length``), and the model's tokenizer (with ``chat_template`` read from that
    file where given). ``polopt train`` and ``polopt data`` read a file for a model alike."""
    if str(spec.tokenizer) != "byte":
        raise ValueError(f"task.tokenizer is not read with model=local_lm (the tokenizer of model.path is), got "
                         f"task.tokenizer={spec.tokenizer!r}: leave it out")
    path = str(model_folder(path))
    tokenizer = load_tokenizer(path)
    if chat_template is not None:
        tokenizer.chat_template = read_chat_template(chat_template)
    limit = context_of(path, context)
    limit = limit if spec.max_length is None else min(limit, spec.max_length)
    measured_later = type(spec)(**{**spec.as_dict(), "max_length": None})  # lengths in the model's tokens, below
    data, token_ids = encode_rows(tokenizer, read_pair_file(measured_later, messages=True), limit=limit,
                                  truncation=spec.truncation)
    return data, token_ids, tokenizer


def read_chat_template(path) -> str:
    """The Jinja chat template in the file ``task.chat_template`` names."""
    file = Path(path)
    if not file.is_file():
        raise ValueError(f"task.chat_template must be a file holding a Jinja chat template, got {str(path)!r} "
                         "(no such file)")
    text = file.read_text(encoding="utf-8")
    if not text.strip():
        raise ValueError(f"task.chat_template {str(path)!r} is empty")
    return text
