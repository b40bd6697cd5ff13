"""Where the trainer's tensors live: ``train.device`` (cpu, cuda, cuda:N, auto) checked and resolved.

The CPU is the default and the reference: every test and figure of polopt runs
there. ``train.device=cuda`` moves the policy and each batch to a GPU for the
training loop only (the task, the reference cache, the data and the summary stay
on the CPU, and the policy comes back to it after the last step), for
``task=pairs`` with ``method=offline``: the toy tasks are small enough that a
GPU only adds transfers. With torchrun, rank r takes ``cuda:LOCAL_RANK`` and the
process group uses NCCL; on the CPU it uses gloo (torch.distributed's backends:
https://pytorch.org/docs/stable/distributed.html#backends).
"""

from __future__ import annotations

import torch

CHOICES = "cpu, cuda, cuda:N or auto (cuda when torch sees a GPU, else cpu)"


def resolve(name: str | None, *, local_rank: int = 0, processes: int = 1,
            cuda_available: bool | None = None) -> torch.device:
    """The device ``train.device`` names; ``cuda`` without an index becomes ``cuda:local_rank``.

    ``cuda_available`` stands in for ``torch.cuda.is_available()`` (tests), and then every index
    up to the one asked for counts as present.

    Raises ValueError for an unknown name, or for a GPU that this torch cannot see (a CPU
    build, no driver, or an index beyond the GPUs present), saying what to set instead.
    """
    available = torch.cuda.is_available() if cuda_available is None else cuda_available
    text = "cpu" if name is None else str(name).strip().lower()
    if text == "auto":
        text = "cuda" if available else "cpu"
    try:
        device = torch.device(text)
    except RuntimeError as err:
        raise ValueError(f"train.device must be {CHOICES}, got {name!r}") from err
    if device.type == "cpu":
        return torch.device("cpu")
    if device.type != "cuda":
        raise ValueError(f"train.device must be {CHOICES}, got {name!r} (polopt trains on the CPU or on CUDA GPUs)")
    if not available:
        build = "a CPU build of torch" if torch.version.cuda is None else f"torch built for CUDA {torch.version.cuda}"
        raise ValueError(f"train.device={name} but torch sees no GPU ({build}, torch.cuda.is_available() is False); "
                         "use train.device=cpu, which needs none")
    if device.index is not None and processes > 1:
        raise ValueError(f"train.device={name} with {processes} processes would put them all on one GPU; "
                         "give train.device=cuda, and each process takes the GPU of its LOCAL_RANK")
    index = local_rank if device.index is None else device.index
    count = torch.cuda.device_count() if cuda_available is None else index + 1
    if index >= count:
        raise ValueError(f"train.device={name}: GPU {index} asked for, but torch sees {count} "
                         f"(with torchrun, give at most one process per GPU)")
    return torch.device("cuda", index)


def process_group_backend(device: torch.device) -> str:
    """torch.distributed's backend for a device: NCCL for CUDA GPUs, gloo for the CPU."""
    return "nccl" if device.type == "cuda" else "gloo"
