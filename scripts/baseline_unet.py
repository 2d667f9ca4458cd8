"""A plain hand-written U-Net training script, the yardstick for fcnkit's training (bench_train_vs_script.py):
a small U-Net, Adam 1e-3, cross-entropy ignoring unlabelled pixels, random crops + flips, for a wall-time budget."""
import time
from itertools import pairwise

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F


def block(a, b):
    return nn.Sequential(nn.Conv2d(a, b, 3, padding=1), nn.BatchNorm2d(b), nn.ReLU(inplace=True),
                         nn.Conv2d(b, b, 3, padding=1), nn.BatchNorm2d(b), nn.ReLU(inplace=True))


class UNet(nn.Module):  # Ronneberger et al. 2015, with batch norm and padded convolutions
    def __init__(self, bands, classes, w=(16, 32, 64, 128)):
        super().__init__()
        self.down = nn.ModuleList([block(bands, w[0])] + [block(a, b) for a, b in pairwise(w)])
        self.up = nn.ModuleList([nn.ConvTranspose2d(b, a, 2, stride=2) for a, b in pairwise(w)])
        self.dec = nn.ModuleList([block(2 * a, a) for a in w[:-1]])
        self.head = nn.Conv2d(w[0], classes, 1)

    def forward(self, x):  # height and width: multiples of 8
        skips = [x := self.down[0](x)]
        for down in self.down[1:]:
            skips.append(x := down(F.max_pool2d(x, 2)))
        for up, dec, skip in zip(self.up[::-1], self.dec[::-1], skips[-2::-1], strict=True):
            x = dec(torch.cat([up(x), skip], 1))
        return self.head(x)


def train(images, masks, classes, seconds, patch=64, batch=8, lr=1e-3, ignore=255, seed=0):
    """images: H×W×B arrays, masks: H×W class ids (``ignore`` = unlabelled). Returns (model, mean, std)."""
    start, rng = time.perf_counter(), np.random.default_rng(seed)
    torch.manual_seed(seed)
    xs = [torch.from_numpy(im.astype(np.float32)).permute(2, 0, 1) for im in images]
    std, mean = (v[:, None, None] for v in torch.std_mean(torch.cat([x.flatten(1) for x in xs], 1), dim=1))
    xs, ys = [(x - mean) / std for x in xs], [torch.from_numpy(m.astype(np.int64)) for m in masks]
    model = UNet(xs[0].shape[0], classes).train()
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    while time.perf_counter() - start < seconds:
        bx, by = [], []
        for j in rng.integers(len(xs), size=batch):
            r, c = rng.integers(ys[j].shape[0] - patch + 1), rng.integers(ys[j].shape[1] - patch + 1)
            flips = [d for d in (-1, -2) if rng.random() < 0.5]
            bx.append(xs[j][:, r:r + patch, c:c + patch].flip(flips))
            by.append(ys[j][r:r + patch, c:c + patch].flip(flips))
        loss = F.cross_entropy(model(torch.stack(bx)), torch.stack(by), ignore_index=ignore)
        opt.zero_grad()
        loss.backward()
        opt.step()
    return model.eval(), mean, std


@torch.no_grad()
def predict(model, mean, std, image):  # whole image: H×W×B array in, H×W class ids out
    x = (torch.from_numpy(image.astype(np.float32)).permute(2, 0, 1) - mean) / std
    return model(x[None])[0].argmax(0).numpy()
