"""Capture from torch models and the torch decoder adapter, checked against torch itself.

torch is the reference throughout: ``nn.MultiheadAttention`` called directly with
``need_weights=True, average_attn_weights=False`` for the weights, and a plain
teacher-forced forward pass for the adapter's log-probabilities.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from conftest import require

import peekalign


def _padded_batch(torch, d: int, frames, tokens, *, seed: int = 3):
    """Random memory (B, T_max, d) and token ids (B, U_max) with padding masks."""
    g = torch.Generator().manual_seed(seed)
    b, t_max, u_max = len(frames), max(frames), max(tokens)
    mem = torch.randn(b, t_max, d, generator=g, dtype=torch.float64)
    ids = torch.randint(1, 9, (b, u_max), generator=g)
    mem_pad = torch.arange(t_max)[None, :] >= torch.tensor(frames)[:, None]
    tgt_pad = torch.arange(u_max)[None, :] >= torch.tensor(tokens)[:, None]
    mem = mem.masked_fill(mem_pad[..., None], 7.0)  # padding that must not leak in
    return mem, ids, mem_pad, tgt_pad


def _random_decoder(torch, d=16, heads=4, layers=2):
    torch.manual_seed(11)
    layer = torch.nn.TransformerDecoderLayer(d, heads, 32, dropout=0.0, batch_first=True)
    dec = torch.nn.TransformerDecoder(layer, layers).double().eval()
    embed = torch.nn.Embedding(10, d).double()
    head = torch.nn.Linear(d, 10).double()
    return dec, embed, head


def _reference_cross_attention(torch, dec, x, mem):
    """Per layer, torch's own MHA called directly on one unpadded utterance.

    Runs the post-norm layer's public parts in the order nn.TransformerDecoderLayer
    documents (self-attention, norm1, cross-attention, norm2, feed-forward, norm3).
    """
    u = x.shape[1]
    causal = torch.triu(torch.ones(u, u, dtype=torch.bool), 1)
    weights = []
    for layer in dec.layers:
        sa = layer.self_attn(x, x, x, attn_mask=causal, need_weights=False)[0]
        x = layer.norm1(x + sa)
        out, w = layer.multihead_attn(
            x, mem, mem, need_weights=True, average_attn_weights=False
        )  # reference: torch nn.MultiheadAttention
        weights.append(w[0])
        x = layer.norm2(x + out)
        x = layer.norm3(x + layer.linear2(layer.activation(layer.linear1(x))))
    return torch.stack(weights).detach().numpy()  # (L, H, U, T)


@pytest.mark.parametrize("recompute", [False, True])
def test_captured_cross_attention_equals_mha_on_a_padded_batch(recompute):
    torch = require("torch")
    from peekalign.torch_capture import Capture

    dec, embed, head = _random_decoder(torch)
    frames, tokens = [9, 5, 3], [4, 2, 3]
    mem, ids, mem_pad, tgt_pad = _padded_batch(torch, 16, frames, tokens)
    u_max = ids.shape[1]
    causal = torch.triu(torch.ones(u_max, u_max, dtype=torch.bool), 1)

    class Model(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.enc, self.dec, self.embed, self.ctc = torch.nn.Identity(), dec, embed, head

        def forward(self, mem, ids):
            mem = self.enc(mem)
            self.ctc(mem)
            return self.dec(
                self.embed(ids),
                mem,
                tgt_mask=causal,
                tgt_key_padding_mask=tgt_pad,
                memory_key_padding_mask=mem_pad,
            )

    model = Model().eval()
    with torch.no_grad():
        plain = model(mem, ids)
        with Capture(model, log_probs="ctc", encoder="enc", recompute=recompute) as cap:
            hooked = model(mem, ids)
    # the hooks change nothing the model computes
    assert torch.allclose(plain, hooked, atol=1e-12)
    items = cap.utterances(frames, tokens)
    for i, item in enumerate(items):
        t, u = frames[i], tokens[i]
        with torch.no_grad():
            x = embed(ids[i : i + 1, :u])
            ref = _reference_cross_attention(torch, dec, x, mem[i : i + 1, :t])
        assert item["attention"].shape == ref.shape == (2, 4, u, t)
        np.testing.assert_allclose(item["attention"], ref, atol=1e-6)  # reference: torch MHA
        assert item["encoder_out"].shape == (t, 16) and item["log_probs"].shape == (t, 10)
        # reference: torch log_softmax of the head's output
        want = torch.log_softmax(head(mem[i, :t]).float(), -1).detach().numpy()
        np.testing.assert_allclose(item["log_probs"], want, atol=1e-6)


@pytest.mark.parametrize("padded", [False, True])
def test_recomputed_attention_from_q_and_k_equals_mha_weights(padded):
    torch = require("torch")
    from torch.nn import functional

    from peekalign.torch_capture import QK, Capture

    d, heads = 16, 4
    torch.manual_seed(5)
    mha = torch.nn.MultiheadAttention(d, heads, batch_first=True).double().eval()

    class FusedCross(torch.nn.Module):
        """An attention of the user's own on a fused kernel: no weights come out."""

        def __init__(self):
            super().__init__()
            self.q_proj = torch.nn.Linear(d, d).double()
            self.k_proj = torch.nn.Linear(d, d).double()
            self.v_proj = torch.nn.Linear(d, d).double()
            w, bias = mha.in_proj_weight.detach(), mha.in_proj_bias.detach()
            for k, lin in enumerate((self.q_proj, self.k_proj, self.v_proj)):
                lin.weight.data.copy_(w[k * d : (k + 1) * d])
                lin.bias.data.copy_(bias[k * d : (k + 1) * d])

        def forward(self, x, mem, pad=None):
            def split(y):
                return y.reshape(y.shape[0], y.shape[1], heads, -1).transpose(1, 2)

            mask = None if pad is None else ~pad[:, None, None, :]
            return functional.scaled_dot_product_attention(
                split(self.q_proj(x)), split(self.k_proj(mem)), split(self.v_proj(mem)), mask
            )

    frames = [8, 5] if padded else [8, 8]
    mem, ids, mem_pad, _ = _padded_batch(torch, d, frames, [3, 3])
    x = torch.randn(2, 3, d, dtype=torch.float64)
    net = torch.nn.ModuleDict({"cross": FusedCross(), "ctc": torch.nn.Linear(d, 5).double()})
    pad = mem_pad if padded else None
    with (
        torch.no_grad(),
        Capture(net, log_probs="ctc", qk=[QK("cross.q_proj", "cross.k_proj", heads=heads)]) as cap,
    ):
        net["ctc"](mem)
        net["cross"](x, mem, pad)
        # reference: torch nn.MultiheadAttention's own weights
        want = mha(
            x, mem, mem, key_padding_mask=pad, need_weights=True, average_attn_weights=False
        )[1]
    for i, item in enumerate(cap.utterances(frames)):
        t = frames[i]
        np.testing.assert_allclose(item["attention"][0], want[i, :, :, :t].numpy(), atol=1e-6)
        if padded:  # the padded keys carried no weight in the reference either
            assert float(want[i, :, :, t:].abs().sum()) == 0.0


def test_attention_from_qk_with_an_additive_mask_equals_mha():
    torch = require("torch")
    from peekalign.torch_capture import attention_from_qk

    d, heads = 8, 2
    torch.manual_seed(2)
    mha = torch.nn.MultiheadAttention(d, heads, batch_first=True).double()
    q_in, k_in = torch.randn(1, 4, d).double(), torch.randn(1, 6, d).double()
    mask = torch.randn(4, 6).double()
    want = mha(q_in, k_in, k_in, attn_mask=mask, need_weights=True, average_attn_weights=False)[1]
    w, b = mha.in_proj_weight, mha.in_proj_bias
    q = q_in @ w[:d].T + b[:d]
    k = k_in @ w[d : 2 * d].T + b[d : 2 * d]
    got = attention_from_qk(q, k, heads=heads, attn_mask=mask)
    np.testing.assert_allclose(
        got.detach().numpy(), want.detach().numpy(), atol=1e-6
    )  # reference: torch MHA


def _tiny_model(torch):
    from peekalign.demo_model.network import TinyRecognizer

    torch.manual_seed(4)
    return TinyRecognizer(vocab=7, d_model=16, heads=2, ff=32, enc_layers=1, dec_layers=2).eval()


def test_adapter_at_the_last_frame_equals_a_teacher_forced_forward():
    torch = require("torch")
    from peekalign.torch_capture import TorchDecoder

    model = _tiny_model(torch)
    rng = np.random.default_rng(1)
    T, sos = 12, 7
    enc = rng.normal(size=(T, 16)).astype(np.float32)
    tokens = [3, 1, 4, 1, 5, 6, 2]
    utt = peekalign.Utterance.from_arrays(
        np.log(np.full((T, 7), 1 / 7)), ref="", vocab=list("-|abcde"), encoder_out=enc
    )
    dec = TorchDecoder(lambda e, p: model.decode(p, e, None), eos=sos, sos=sos, batch_size=3)
    ud = dec.open(utt)
    prefixes = [tokens[:u] for u in range(len(tokens) + 1)]
    got = ud.log_probs(prefixes, [T - 1] * len(prefixes))
    with torch.no_grad():  # reference: one unmasked teacher-forced torch forward pass
        logits = model.decode(torch.tensor([[sos] + tokens]), torch.from_numpy(enc)[None], None)
        want = torch.log_softmax(logits[0], -1).numpy()
    np.testing.assert_allclose(got, want, atol=1e-5)
    # asked again (in another order), the kept results come back unchanged
    again = ud.log_probs(prefixes[::-1], [T - 1] * len(prefixes))
    np.testing.assert_array_equal(again, got[::-1])


def test_demo_decoder_at_the_last_frame_equals_a_teacher_forced_forward():
    torch = require("torch")
    from peekalign.data import demo_path
    from peekalign.demo_model import checkpoint_paths, demo_decoder

    if not checkpoint_paths()[0].is_file():
        pytest.fail("the demo checkpoint peekalign/data/demo/model.npz is missing")
    bundle = peekalign.open_bundle(demo_path("full"))
    dec = demo_decoder(bundle)
    utt = bundle[bundle.ids[0]]
    tokens = [int(t) for t in utt.hyp_tokens][:12]
    ud = dec.open(utt)
    got = ud.log_probs([tokens[:u] for u in range(len(tokens) + 1)], [utt.num_frames - 1] * 13)
    sos = dec.eos
    enc = torch.as_tensor(ud.enc)[None]
    with torch.no_grad():  # reference: unmasked teacher-forced torch forward pass
        logits = dec.model.decode(torch.tensor([[sos] + tokens]), enc, None)
    np.testing.assert_allclose(got, torch.log_softmax(logits[0], -1).numpy(), atol=1e-5)


def test_no_captured_weight_falls_past_the_window_at_eps():
    torch = require("torch")
    from peekalign.torch_capture import Capture, TorchDecoder

    model = _tiny_model(torch)
    rng = np.random.default_rng(2)
    T, sos, eps = 20, 7, 2
    enc = rng.normal(size=(T, 16)).astype(np.float32)
    tokens = [3, 1, 4, 5, 6]
    trig = np.array([2, 5, 9, 13, 16])
    vocab = peekalign.Vocabulary(
        list("-|abcde"), boundary=peekalign.WordBoundary("separator", "|")
    )
    utt = peekalign.Utterance.from_arrays(
        np.log(np.full((T, 7), 1 / 7)), ref="", vocab=vocab, encoder_out=enc
    )
    ud = TorchDecoder(lambda e, p: model.decode(p, e, None), eos=sos, sos=sos).open(utt)
    rows = np.zeros((2, 2, len(tokens), T))
    with Capture(
        model, log_probs="ctc_head", attention=["decoder.0.src_attn", "decoder.1.src_attn"]
    ) as cap:
        for u in range(len(tokens)):
            last = min(int(trig[u]) + eps, T - 1)
            ud.log_probs([tokens[:u]], [last])
            w = cap.attention[0, :, :, -1]  # (L, H, T') of the step predicting token u
            rows[:, :, u, : w.shape[-1]] = w.numpy()
    windows = peekalign.token_windows(trig, num_frames=T, clock=utt.clock, lookahead=eps)
    c = peekalign.window_consistency(rows, windows, tol=0.0)  # DEVELOPERS.md, window consistency
    assert c.ok and float(c.outside.max()) == 0.0
    # reference: by hand, each row's weights sum to 1 over frames [0, n_u + eps]
    for u in range(len(tokens)):
        np.testing.assert_allclose(rows[:, :, u, : trig[u] + eps + 1].sum(-1), 1.0, atol=1e-6)


def test_bundle_round_trip_with_encoder_out(tmp_path):
    torch = require("torch")
    from peekalign.torch_capture import Capture

    dec, embed, head = _random_decoder(torch)
    frames, tokens = [6, 4], [3, 2]
    mem, ids, mem_pad, tgt_pad = _padded_batch(torch, 16, frames, tokens)
    net = torch.nn.ModuleDict(
        {"dec": dec, "ctc": torch.nn.Linear(16, 3).double(), "id": torch.nn.Identity()}
    )
    with torch.no_grad(), Capture(net, log_probs="ctc", encoder="id") as cap:
        m = net["id"](mem)
        net["ctc"](m)
        dec(embed(ids), m, memory_key_padding_mask=mem_pad, tgt_key_padding_mask=tgt_pad)
    wb = {"kind": "separator", "symbol": "|"}
    with peekalign.BundleWriter(
        tmp_path / "b", vocab=["-", "|", "a"], frame_shift_s=0.04, word_boundary=wb
    ) as w:
        cap.write(
            w,
            ["u1", "u2"],
            frames,
            tokens,
            refs=["a a", "a"],
            attention_tokens=[[2, 1, 2], [2, 1]],
        )
    b = peekalign.open_bundle(tmp_path / "b")
    for i, uid in enumerate(b.ids):
        utt = b[uid]
        # reference: the captured tensors, padding cut by hand
        np.testing.assert_allclose(utt.encoder_out, mem[i, : frames[i]].numpy(), atol=1e-2)
        assert utt.encoder_out.dtype == np.float32 and utt.attention.shape == (
            2,
            4,
            tokens[i],
            frames[i],
        )


def test_old_bundles_without_encoder_out_still_open():
    from peekalign.data import demo_path

    b = peekalign.open_bundle(demo_path("full"))
    utt = b[b.ids[0]]
    assert utt.encoder_out is None or utt.encoder_out.shape[0] == utt.num_frames
    u = peekalign.Utterance.from_arrays(np.log(np.full((3, 2), 0.5)), ref="", vocab=["-", "a"])
    assert u.encoder_out is None


def test_encoder_out_with_the_wrong_frames_is_refused(tmp_path):
    wb = {"kind": "prefix", "symbol": "a"}
    with pytest.raises(peekalign.ParameterError, match="encoder_out of shape"):
        with peekalign.BundleWriter(
            tmp_path / "b", vocab=["-", "a"], frame_shift_s=0.04, word_boundary=wb
        ) as w:
            w.add("u1", np.log(np.full((3, 2), 0.5)), ref="", encoder_out=np.zeros((4, 5)))
    with pytest.raises(peekalign.BundleError, match="encoder_out"):
        peekalign.Utterance.from_arrays(
            np.log(np.full((3, 2), 0.5)), ref="", vocab=["-", "a"], encoder_out=np.zeros((2, 5))
        )


def test_importing_peekalign_loads_no_torch():
    code = (
        "import sys, peekalign, peekalign.torch_capture, peekalign.demo_model; "
        "print('torch' in sys.modules)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"  # common practice, no source: optional extras load lazily


def test_recorded_attention_triggers_set_the_rows_windows():
    # reference: hand-worked. Tokens a b with spikes at frames 2 and 5; the run decoded
    # its two rows at triggers 1 and 4 (recorded), so with look-ahead 1 the windows end
    # at frames 2 and 5, not at 3 and 6 as the forced alignment's first frames would give
    v = peekalign.Vocabulary(
        ["-", "|", "a", "b"], boundary=peekalign.WordBoundary("separator", "|")
    )
    p = np.full((8, 4), 0.01)
    p[:, 0] = 0.97
    p[2, 2] = p[5, 3] = 0.9
    lp = np.log(p / p.sum(1, keepdims=True))
    att = np.full((2, 8), 1 / 8)
    kw = dict(ref="ab", vocab=v, attention=att, attention_tokens=[2, 3])
    w = peekalign.token_windows([0, 0], num_frames=8, clock=peekalign.FrameClock(), lookahead=1)
    plain = peekalign.Utterance.from_arrays(lp, **kw)
    assert peekalign.attention_windows(plain, w)[0].end.tolist() == [3, 6]
    recorded = peekalign.Utterance.from_arrays(lp, attention_triggers=[1, 4], **kw)
    assert peekalign.attention_windows(recorded, w)[0].end.tolist() == [2, 5]
    for bad in ([1], [4, 1], [1, 8]):
        with pytest.raises(peekalign.BundleError, match="attention_triggers"):
            peekalign.Utterance.from_arrays(lp, attention_triggers=bad, **kw)
