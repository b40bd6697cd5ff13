"""Loading a local causal LM safely, and LoRA on it (polopt/models/local_lm.py, polopt/models/lora.py).

The models are the tiny Llama- and GPT-2-shaped ones of tests/helpers_local_lm.py, built and saved in the
test. What a check is held to: transformers' own ``from_pretrained`` and forward pass, peft's
``get_peft_model``/``disable_adapter`` and its table of default targets.
"""

from __future__ import annotations

import ast
import json
import shutil
from pathlib import Path

import pytest
import torch

transformers = pytest.importorskip("transformers")
peft = pytest.importorskip("peft")

from helpers_local_lm import save_gpt2, save_llama  # noqa: E402

from polopt.models import local_lm  # noqa: E402
from polopt.models.lora import LoraSettings, attention_linear_names, lora_targets, with_lora  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def llama(tmp_path_factory):
    return save_llama(tmp_path_factory.mktemp("llama"))


@pytest.fixture(scope="module")
def gpt2(tmp_path_factory):
    return save_gpt2(tmp_path_factory.mktemp("gpt2"))


def copy_of(folder: Path, tmp_path: Path) -> Path:
    out = tmp_path / "copy"
    shutil.copytree(folder, out)
    return out


def edit_json(path: Path, **fields) -> None:
    data = json.loads(path.read_text())
    data.update(fields)
    path.write_text(json.dumps(data))


def test_a_folder_without_config_json_is_refused(tmp_path):
    with pytest.raises(ValueError, match=r"model.path must be a local folder holding a transformers causal LM "
                                         r".*got '.*nowhere' \(no config.json\); nothing is downloaded"):
        local_lm.load_model(tmp_path / "nowhere")


@pytest.mark.parametrize("file", ["config.json", "tokenizer_config.json"])
def test_a_folder_naming_custom_code_is_refused(llama, tmp_path, file):
    """A planted ``auto_map`` (what makes transformers import a module from the folder, given
    trust_remote_code): refused before transformers reads anything."""
    folder = copy_of(llama, tmp_path)
    edit_json(folder / file, auto_map={"AutoModelForCausalLM": "modeling_evil.EvilForCausalLM"})
    (folder / "modeling_evil.py").write_text("raise SystemExit('ran code from the model folder')\n")
    with pytest.raises(ValueError, match=rf"{file} names custom code \(auto_map: \['AutoModelForCausalLM'\]\); "
                                         r"polopt never runs code from a model folder \(trust_remote_code is "
                                         r"never set\)"):
        local_lm.load_model(folder)
    with pytest.raises(ValueError, match="names custom code"):
        local_lm.load_tokenizer(folder)


def test_an_architecture_transformers_lacks_is_refused(llama, tmp_path):
    folder = copy_of(llama, tmp_path)
    edit_json(folder / "config.json", model_type="evil_lm")
    with pytest.raises(ValueError, match=r"config.json's model_type 'evil_lm' is not built into transformers"):
        local_lm.load_model(folder)


def test_pickled_weights_alone_are_refused(llama, tmp_path):
    """A folder with only ``pytorch_model.bin`` (a pickle) is refused: weights come from safetensors only."""
    folder = copy_of(llama, tmp_path)
    weights = transformers.AutoModelForCausalLM.from_pretrained(folder).state_dict()
    torch.save(weights, folder / "pytorch_model.bin")
    (folder / "model.safetensors").unlink()
    with pytest.raises(ValueError, match=r"holds only pickled weights \(pytorch_model.bin\); polopt reads weights "
                                         r"from safetensors only"):
        local_lm.load_model(folder)


def test_no_call_in_the_library_passes_trust_remote_code():
    """The source never sets trust_remote_code (scanned with Python's own parser)."""
    found = []
    for path in [*ROOT.glob("polopt/**/*.py"), *ROOT.glob("toy_tasks/**/*.py")]:
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Call) and any(k.arg == "trust_remote_code" for k in node.keywords):
                found.append(f"{path.name}:{node.lineno}")
    assert found == []


@pytest.mark.parametrize("arch", ["llama", "gpt2"])
def test_the_wrapper_gives_the_models_own_logits_under_padding(arch, request):
    """CausalLM on a right-padded batch equals ``model(ids).logits`` of each row alone, on its real tokens."""
    folder = request.getfixturevalue(arch)
    model = local_lm.load_model(folder)
    rows = [[5, 9, 12, 7], [4, 8]]
    tokens = torch.tensor([rows[0], rows[1] + [local_lm.PAD] * 2])  # (2, 4)
    with torch.no_grad():
        got = local_lm.CausalLM(model)(tokens)  # (2, 4, V)
        for i, row in enumerate(rows):
            want = model(torch.tensor([row])).logits[0]  # (T_i, V)
            torch.testing.assert_close(got[i, : len(row)], want, rtol=1e-5, atol=1e-5)


def test_lora_targets_default_to_peft_choice(llama, gpt2):
    """No targets named: peft's own table (q_proj, v_proj for Llama; c_attn for GPT-2)."""
    for folder, want in ((llama, {"q_proj", "v_proj"}), (gpt2, {"c_attn"})):
        adapted = with_lora(local_lm.load_model(folder), LoraSettings())
        assert set(adapted.peft_config["default"].target_modules) == want


def test_lora_targets_without_a_peft_choice_are_the_attention_linear_layers(llama, monkeypatch):
    from peft.utils import TRANSFORMERS_MODELS_TO_LORA_TARGET_MODULES_MAPPING as table

    monkeypatch.delitem(table, "llama")
    model = local_lm.load_model(llama)
    assert lora_targets(model, LoraSettings()) == attention_linear_names(model) == ["k_proj", "o_proj", "q_proj",
                                                                                    "v_proj"]


def test_a_lora_target_the_model_lacks_is_one_line(llama):
    with pytest.raises(ValueError, match=r"model.lora.targets: the model has no linear layer named 'c_attn'; its "
                                         r"linear layers are named down_proj, gate_proj, k_proj, lm_head, o_proj, "
                                         r"q_proj, up_proj, v_proj"):
        with_lora(local_lm.load_model(llama), LoraSettings(targets=("q_proj", "c_attn")))


@pytest.mark.parametrize("key,value,message", [
    ("r", 0, "model.lora.r must be a positive integer"),
    ("alpha", -1, "model.lora.alpha must be a number > 0"),
    ("dropout", 1.0, r"model.lora.dropout must be a number in \[0, 1\)"),
    ("targets", [], "model.lora.targets must be null"),
    ("rank", 4, "model.lora has the keys r, alpha, dropout, targets; got model.lora.rank"),
])
def test_lora_settings_are_checked(key, value, message):
    with pytest.raises(ValueError, match=message):
        LoraSettings.from_config({key: value})


@pytest.mark.parametrize("arch", ["llama", "gpt2"])
def test_the_lora_reference_is_the_base_model(arch, request):
    """With the adapter moved away from its zero start, the adapter-off view (peft's disable_adapter) still
    computes the base model's logits (a fresh from_pretrained), and the adapted model does not."""
    folder = request.getfixturevalue(arch)
    adapted = with_lora(local_lm.load_model(folder), LoraSettings(r=4))
    with torch.no_grad():
        for name, p in adapted.named_parameters():
            if "lora_B" in name:
                p.normal_(0, 0.5)  # as if trained
    base = transformers.AutoModelForCausalLM.from_pretrained(folder).eval()
    tokens = torch.tensor([[5, 9, 12, 7, 6]])
    with torch.no_grad():
        reference = local_lm.CausalLM(adapted, adapter_off=True)(tokens)
        policy = local_lm.CausalLM(adapted)(tokens)
        want = base(tokens).logits
    torch.testing.assert_close(reference, want, rtol=1e-5, atol=1e-5)
    assert (policy - want).abs().max() > 1e-3
    trainable = {n for n, p in adapted.named_parameters() if p.requires_grad}
    assert trainable and all("lora_" in n for n in trainable)  # only the adapter trains
