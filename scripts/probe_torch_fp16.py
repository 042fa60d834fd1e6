"""Which torch CPU backend runs each low-precision convolution here, and whether its
forward and gradients are correctly rounded from the float64 result.

Run: python3 scripts/probe_torch_fp16.py   (prints one line per ndim, dtype, dilation)
"""
import torch, numpy as np
torch.manual_seed(0)
for nd, conv in ((1, torch.nn.functional.conv1d), (2, torch.nn.functional.conv2d), (3, torch.nn.functional.conv3d)):
  for dt in (torch.float16, torch.bfloat16):
    for dil in (1, 2):
        x = torch.randn(2, 3, *([7]*nd)).to(dt).requires_grad_()
        w = torch.randn(4, 3, *([3]*nd)).to(dt).requires_grad_()
        be = torch._C._select_conv_backend(x, w, None, [1]*nd, [0]*nd, [dil]*nd, False, [0]*nd, 1)
        y = conv(x, w, dilation=dil)
        g = torch.randn_like(y)
        gx, gw = torch.autograd.grad(y, (x, w), g)
        x64, w64 = x.detach().double().requires_grad_(), w.detach().double().requires_grad_()
        y64 = conv(x64, w64, dilation=dil)
        gx64, gw64 = torch.autograd.grad(y64, (x64, w64), g.double())
        ox = (gx.double() != gx64.to(dt).double()).float().mean().item()
        ow = (gw.double() != gw64.to(dt).double()).float().mean().item()
        oy = (y.double() != y64.to(dt).double()).float().mean().item()
        print(nd, dt, dil, str(be).split('.')[-1], f"y-not-correctly-rounded {oy:.2f} gx {ox:.2f} gw {ow:.2f}")
