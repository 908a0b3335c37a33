"""Reference decoder with numpy.fft for the Rust test `numpy_reference_decoder_agrees`.

usage: numpy_reference.py HOLOGRAM.npy PARAMS.json OUT.npy

Full fft2 of the (mean-subtracted) hologram, hard circular window of radius R around the
carrier c (cycles/px), crop of nx x ny bins around the carrier's integer bin in FFT order,
ifft2 at the cropped size, then the conventions of docs/conventions.md: demodulation with the
phase origin at the region's centre pixel, division by |R| and by the fibre-plane pitch.
"""
import json
import sys

import numpy as np

holo = np.load(sys.argv[1])[0].astype(np.float64)
p = json.load(open(sys.argv[2]))
h, w = holo.shape
c = np.array(p["carrier"], dtype=float)
R, nx, ny, r_amp, fp = p["radius"], p["nx"], p["ny"], p["r_amp"], p["fibre_pitch_um"]

F = np.fft.fft2(holo - holo.mean())
kc = np.round(c * np.array([w, h])).astype(int)
mx = np.fft.fftfreq(nx, 1.0 / nx).astype(int)  # 0, 1, ..., -1 (FFT order)
my = np.fft.fftfreq(ny, 1.0 / ny).astype(int)
kx = kc[0] + mx
ky = kc[1] + my
crop = F[np.ix_(ky % h, kx % w)]
fx = kx / w
fy = ky / h
mask = np.hypot(fx[None, :] - c[0], fy[:, None] - c[1]) <= R
e = np.fft.ifft2(crop * mask) * (nx * ny) / (w * h)
rx = np.arange(nx) * w / nx
ry = np.arange(ny) * h / ny
rc = np.array([w // 2, h // 2])
phase = 2 * np.pi * (
    kc[0] / w * rx[None, :] + kc[1] / h * ry[:, None]
    - c[0] * (rx[None, :] - rc[0]) - c[1] * (ry[:, None] - rc[1])
)
field = e * np.exp(1j * phase) / (r_amp * fp)
np.save(sys.argv[3], field.astype(np.complex128))
