"""Models for the coverage test: transformers classes built from tiny configs (random weights, no download) and
plain torch models. Each entry: name -> (build() -> model in eval mode, batch(), fast?)."""

from __future__ import annotations

import torch
from torch import nn

V = 99  # vocabulary of the tiny text models


def _ids(n=2, t=7):
    return torch.randint(3, V, (n, t), generator=torch.Generator().manual_seed(1))


def _pixels(n=2, c=3, s=32):
    return torch.randn(n, c, s, s, generator=torch.Generator().manual_seed(2))


def _tf(cls_name: str, config_name: str, **config):
    import transformers

    cfg = getattr(transformers, config_name)(**config)
    return getattr(transformers, cls_name)(cfg)


TEXT = dict(vocab_size=V, hidden_size=32, num_hidden_layers=2, num_attention_heads=4, intermediate_size=37)
DECODER = dict(TEXT, num_key_value_heads=2, max_position_embeddings=64)


def _whisper_batch():
    g = torch.Generator().manual_seed(3)
    return {"input_features": torch.randn(1, 8, 32, generator=g), "decoder_input_ids": _ids(1, 5)}


TRANSFORMERS = {
    "BERT": (lambda: _tf("BertModel", "BertConfig", **TEXT), lambda: {"input_ids": _ids()}, True),
    "DistilBERT": (lambda: _tf("DistilBertModel", "DistilBertConfig", vocab_size=V, dim=32, n_layers=2, n_heads=4,
                               hidden_dim=37), lambda: {"input_ids": _ids()}, False),
    "RoBERTa": (lambda: _tf("RobertaModel", "RobertaConfig", **TEXT, pad_token_id=1), lambda: {"input_ids": _ids()},
                False),
    "GPT-2": (lambda: _tf("GPT2LMHeadModel", "GPT2Config", vocab_size=V, n_embd=32, n_layer=2, n_head=4,
                          n_positions=64, bos_token_id=1,
                          eos_token_id=2), lambda: {"input_ids": _ids()}, True),
    "Llama": (lambda: _tf("LlamaForCausalLM", "LlamaConfig", **DECODER), lambda: {"input_ids": _ids()}, True),
    "Mistral": (lambda: _tf("MistralForCausalLM", "MistralConfig", **DECODER), lambda: {"input_ids": _ids()}, False),
    "Qwen2": (lambda: _tf("Qwen2ForCausalLM", "Qwen2Config", **DECODER), lambda: {"input_ids": _ids()}, False),
    "Gemma": (lambda: _tf("GemmaForCausalLM", "GemmaConfig", **DECODER, head_dim=8), lambda: {"input_ids": _ids()},
              False),
    "Phi": (lambda: _tf("PhiForCausalLM", "PhiConfig", **DECODER), lambda: {"input_ids": _ids()}, False),
    "T5": (lambda: _tf("T5Model", "T5Config", vocab_size=V, d_model=32, d_kv=8, d_ff=37, num_layers=2, num_heads=4),
           lambda: {"input_ids": _ids(), "decoder_input_ids": _ids(2, 4)}, True),
    "Whisper": (lambda: _tf("WhisperModel", "WhisperConfig", vocab_size=V, d_model=32, encoder_layers=1,
                            decoder_layers=1, encoder_attention_heads=4, decoder_attention_heads=4,
                            encoder_ffn_dim=37, decoder_ffn_dim=37, num_mel_bins=8, max_source_positions=16,
                            max_target_positions=32, pad_token_id=0, bos_token_id=1,
                            eos_token_id=2, decoder_start_token_id=1), _whisper_batch, True),
    "ViT": (lambda: _tf("ViTModel", "ViTConfig", image_size=16, patch_size=4, hidden_size=32, num_hidden_layers=2,
                        num_attention_heads=4, intermediate_size=37), lambda: _pixels(s=16), True),
    "CLIP": (lambda: _tf("CLIPModel", "CLIPConfig",
                         text_config=dict(vocab_size=V, bos_token_id=1, eos_token_id=2, pad_token_id=0, hidden_size=32,
                                          num_hidden_layers=1, num_attention_heads=4, intermediate_size=37,
                                          max_position_embeddings=16),
                         vision_config=dict(image_size=16, patch_size=4, hidden_size=32, num_hidden_layers=1,
                                            num_attention_heads=4, intermediate_size=37), projection_dim=16),
             lambda: {"input_ids": _ids(), "pixel_values": _pixels(s=16)}, False),
    "Wav2Vec2": (lambda: _tf("Wav2Vec2Model", "Wav2Vec2Config", hidden_size=32, num_hidden_layers=2,
                             num_attention_heads=4, intermediate_size=37, conv_dim=(16, 16), conv_stride=(4, 2),
                             conv_kernel=(8, 4), num_conv_pos_embeddings=16, num_conv_pos_embedding_groups=2),
                 lambda: torch.randn(1, 400, generator=torch.Generator().manual_seed(4)), False),
    "ResNet": (lambda: _tf("ResNetModel", "ResNetConfig", embedding_size=16, hidden_sizes=[16, 32], depths=[1, 1],
                           layer_type="basic"), _pixels, False),
    "ConvNeXt": (lambda: _tf("ConvNextModel", "ConvNextConfig", num_stages=2, hidden_sizes=[16, 32], depths=[1, 1]),
                 _pixels,
                 False),
    "MobileNetV2": (lambda: _tf("MobileNetV2Model", "MobileNetV2Config", image_size=32, depth_multiplier=0.35),
                    _pixels, True),
}


class MLP(nn.Module):
    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 10))

    def forward(self, x):
        return self.net(x)


class CNN(nn.Module):
    def __init__(self, conv=nn.Conv2d, groups=1, channels=3):
        super().__init__()
        self.c1 = conv(channels, 16, 3, padding=1)
        self.c2 = conv(16, 32, 3, padding=1, groups=groups)
        self.head = nn.Linear(32, 10)

    def forward(self, x):
        h = torch.relu(self.c2(torch.relu(self.c1(x))))
        return self.head(h.flatten(2).mean(-1))


class UpCNN(nn.Module):  # transposed convolutions, as in decoders and segmentation heads
    def __init__(self):
        super().__init__()
        self.down = nn.Conv2d(3, 16, 3, stride=2, padding=1)
        self.up = nn.ConvTranspose2d(16, 8, 2, stride=2)
        self.up1 = nn.ConvTranspose1d(8, 8, 2, stride=2)
        self.head = nn.Linear(8, 10)

    def forward(self, x):
        h = self.up(torch.relu(self.down(x)))  # (n, 8, 32, 32)
        return self.head(self.up1(h.mean(-1)).mean(-1))


class Attn(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(V, 32)
        self.attn = nn.MultiheadAttention(32, 4, batch_first=True)
        self.head = nn.Linear(32, 10)

    def forward(self, ids):
        h = self.embed(ids)
        return self.head(self.attn(h, h, h, need_weights=False)[0])


class Encoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(V, 32)
        layer = nn.TransformerEncoderLayer(32, 4, 64, batch_first=True)
        self.enc = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.head = nn.Linear(32, 10)

    def forward(self, ids):
        return self.head(self.enc(self.embed(ids)))


class Recurrent(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(V, 32)
        self.lstm = nn.LSTM(32, 32, batch_first=True)
        self.gru = nn.GRU(32, 32, batch_first=True)
        self.head = nn.Linear(32, 10)

    def forward(self, ids):
        return self.head(self.gru(self.lstm(self.embed(ids))[0])[0])


TORCH = {
    "MLP": (MLP, lambda: torch.randn(8, 20, generator=torch.Generator().manual_seed(5)), True),
    "CNN": (CNN, _pixels, True),
    "TransformerEncoder": (Encoder, _ids, True),
    "MultiheadAttention": (Attn, _ids, True),
    "LSTM/GRU": (Recurrent, _ids, True),
    "grouped conv": (lambda: CNN(groups=4), _pixels, True),
    "ConvTranspose1d/2d": (UpCNN, _pixels, True),
    "Conv3d": (lambda: CNN(conv=nn.Conv3d), lambda: torch.randn(1, 3, 8, 8, 8), True),
}

ZOO = {**TRANSFORMERS, **TORCH}


def build(name: str):
    make, batch, _ = ZOO[name]
    torch.manual_seed(0)
    return make().eval(), batch()
