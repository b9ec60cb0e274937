"""Operation and byte counts of layer kinds, checked against published model totals and by hand."""

from __future__ import annotations

import pytest

from eaves.layers import DTYPE_BYTES, KINDS, LayerSpec, conv_out, count, shape_problems, with_batch


def spec(kind, dtype="fp32", **shape) -> LayerSpec:
    return LayerSpec(name="x", kind=kind, dtype=dtype, threads=1, seconds=(1.0,), shape=shape)


def conv(c, h, k, r, stride=1, padding=None, groups=1) -> LayerSpec:
    return spec("conv2d", n=1, c=c, h=h, w=h, k=k, r=r, s=r, stride=stride,
                padding=r // 2 if padding is None else padding, groups=groups)


def resnet50(stride_in_3x3: bool) -> list[LayerSpec]:
    """ResNet-50 at 224x224 from He et al., "Deep Residual Learning for Image Recognition", CVPR 2016,
    Table 1 (50-layer column): conv1 7x7/2, 3x3 max pool /2, bottleneck stages of 3, 4, 6, 3 blocks
    ([1x1, w], [3x3, w], [1x1, 4w], w = 64, 128, 256, 512), projection shortcuts (1x1) where the shape
    changes, downsampling by stride 2 at the first block of conv3_x to conv5_x, average pool, fc 1000."""
    layers = [conv(3, 224, 64, 7, stride=2)]
    h, cin = 56, 64
    for width, blocks, first_stride in ((64, 3, 1), (128, 4, 2), (256, 6, 2), (512, 3, 2)):
        for b in range(blocks):
            s = first_stride if b == 0 else 1
            s1, s3 = (1, s) if stride_in_3x3 else (s, 1)
            layers.append(conv(cin, h, width, 1, s1))
            h1 = conv_out(h, 1, s1, 0, 1)
            layers.append(conv(width, h1, width, 3, s3))
            h2 = conv_out(h1, 3, s3, 1, 1)
            layers.append(conv(width, h2, 4 * width, 1))
            if b == 0:
                layers.append(conv(cin, h, 4 * width, 1, s))  # projection shortcut
            cin, h = 4 * width, h2
    layers.append(spec("dense", m=1, n=1000, k=2048))
    return layers


def test_resnet50_multiply_adds_match_the_paper():
    # Counting convention: MACs of the convolutions (projection shortcuts included) and the fc layer;
    # batch norm, ReLU, pooling and the residual additions are not multiply-adds and are left out.
    # He et al. 2016, Table 1 gives 3.8e9 "FLOPs" (multiply-adds) with the stride on the first 1x1
    # convolution of a stage, as the paper describes; the widely used variant that strides the 3x3
    # convolution instead totals about 4.1e9 (figure from memory). Tolerance: 3%.
    paper = sum(count(l).macs for l in resnet50(stride_in_3x3=False))
    strided_3x3 = sum(count(l).macs for l in resnet50(stride_in_3x3=True))
    assert paper == pytest.approx(3.8e9, rel=0.03)
    assert strided_3x3 == pytest.approx(4.1e9, rel=0.03)
    assert len(resnet50(True)) == 54  # 1 + 16 blocks x 3 + 4 projections + 1 fc


def test_vgg16_multiply_adds_match_the_published_total():
    # Simonyan & Zisserman, "Very Deep Convolutional Networks for Large-Scale Image Recognition",
    # ICLR 2015, Table 1 configuration D: thirteen 3x3 convolutions (stride 1, padding 1) with 2x2 max
    # pools, then fc 4096, 4096, 1000. The total of about 15.5e9 multiply-adds at 224x224 is the
    # commonly quoted figure (from memory; the paper does not tabulate it). Tolerance: 2%.
    plan = [64, 64, "M", 128, 128, "M", 256, 256, 256, "M", 512, 512, 512, "M", 512, 512, 512, "M"]
    layers, c, h = [], 3, 224
    for item in plan:
        if item == "M":
            layers.append(spec("pooling", n=1, c=c, h=h, w=h, r=2, s=2, stride=2))
            h //= 2
        else:
            layers.append(conv(c, h, item, 3))
            c = item
    layers += [spec("dense", m=1, n=4096, k=512 * 7 * 7), spec("dense", m=1, n=4096, k=4096),
               spec("dense", m=1, n=1000, k=4096)]
    assert h == 7
    total = sum(count(l).macs for l in layers)
    assert total == pytest.approx(15.5e9, rel=0.02)
    # weights: about 138 million parameters (the paper's Table 2), without biases
    weights = sum(count(l).weight_bytes for l in layers) / DTYPE_BYTES["fp32"]
    assert weights == pytest.approx(138e6, rel=0.02)


def test_flops_are_two_per_mac_and_bytes_are_the_compulsory_traffic():
    c = count(spec("dense", m=8, n=300, k=200))
    assert c.macs == 8 * 300 * 200
    assert c.flops == 2 * c.macs
    # weights k x n, input m x k, output m x n, each once at 4 bytes (worked by hand)
    assert c.bytes == 4 * (200 * 300 + 8 * 200 + 8 * 300)
    assert c.flops_per_byte == pytest.approx(2 * 480000 / (4 * 64000))


def test_int8_has_four_times_the_intensity_of_fp32():
    # Same operations, a quarter of the bytes (common practice).
    for layer in (conv(64, 56, 64, 3), spec("dense", m=16, n=512, k=512), spec("softmax", rows=8, cols=100)):
        fp32, int8 = count(layer), count(layer, "int8")
        assert int8.flops == fp32.flops
        assert int8.flops_per_byte == pytest.approx(4 * fp32.flops_per_byte)


def test_depthwise_and_grouped_convolutions():
    dw = count(conv(32, 20, 32, 3, groups=32))
    assert dw.macs == 32 * 20 * 20 * 3 * 3  # one 3x3 filter per channel
    grouped = count(conv(32, 20, 64, 3, groups=4))
    assert grouped.macs == count(conv(32, 20, 64, 3)).macs / 4
    assert conv_out(224, 7, 2, 3, 1) == 112  # ResNet-50 conv1 (He et al. 2016, Table 1)
    assert conv_out(10, 3, 1, 0, 2) == 6  # dilation 2 spans 5 pixels


def test_inconsistent_shapes_are_problems():
    assert shape_problems("conv2d", dict(n=1, c=30, h=8, w=8, k=32, r=3, s=3, groups=4))[0][0] == "groups"
    assert shape_problems("conv2d", dict(n=1, c=3, h=2, w=2, k=8, r=5, s=5))[0][0] == "h"
    assert [f for f, _ in shape_problems("dense", dict(m=1))] == ["n", "k"]
    assert shape_problems("conv2d", dict(n=1, c=3, h=8, w=8, k=8, r=3, s=3)) == []


def test_attention_recurrent_and_embedding_counts():
    a = count(spec("attention", batch=2, heads=4, q_len=16, k_len=32, head_dim=8))
    assert a.macs == 2 * (2 * 4 * 16 * 32 * 8)  # Q K^T and P V
    assert a.bytes == 4 * (2 * 4 * (16 * 8 + 2 * 32 * 8) + 2 * 4 * 16 * 8)  # Q, K, V in; output
    lstm = count(spec("lstm", batch=3, input_size=10, hidden_size=20))
    gru = count(spec("gru", batch=3, input_size=10, hidden_size=20))
    assert lstm.macs == 4 * 3 * 20 * 30 and gru.macs == 3 * 3 * 20 * 30
    emb = count(spec("embedding", tokens=5, dim=16))
    assert emb.flops == 0 and emb.bytes == 5 * 8 + 2 * 5 * 16 * 4


def test_explicit_counts_override_and_scale_with_dtype():
    layer = LayerSpec("x", "dense", "fp32", 1, (1.0,), {}, flops=1e6, bytes=4e3)
    assert count(layer).flops == 1e6 and count(layer).macs is None
    assert count(layer, "int8").bytes == 1e3
    partly = LayerSpec("x", "dense", "fp32", 1, (1.0,), dict(m=2, n=2, k=2), flops=100.0)
    assert count(partly).flops == 100.0 and count(partly).bytes == 4 * 12


def test_batch_scales_dense_rows_and_attention_batch():
    d = LayerSpec("x", "dense", "fp32", 1, (1.0,), dict(m=4, n=64, k=64), batch=2)
    assert with_batch(d, 8).shape["m"] == 16
    a = spec("attention", heads=2, q_len=4, k_len=4, head_dim=4)
    assert count(with_batch(a, 3)).macs == 3 * count(a).macs


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_every_kind_counts_positive_bytes(kind):
    k = KINDS[kind]
    shape = {p: 4 for p in k.params} | {p: v for p, v in k.defaults.items()}
    if kind == "conv2d":
        shape["groups"] = 2
    c = count(spec(kind, **shape))
    assert c.bytes > 0 and c.flops >= 0
    if c.macs:
        assert c.flops >= 2 * c.macs
