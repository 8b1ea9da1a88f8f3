"""Open probability of the invented voltage-gated channel
(examples/channel_voltage.toml) over V in [-120, 60] mV (model predictions,
invented scenario).

Rates are a·exp(±z·V/25.7) (V in mV); V is declared signed in the model file
({ value = -60.0, min = -120.0, max = 60.0 }). The script computes the
response of the open probability to V (normalized to its Boltzmann limits at
V -> ±∞), its half-activation voltage and slope factor from the logistic
reference fit, and checks the curve against the closed form of a linear
chain at detailed balance, P(O) = K1·K2 / (1 + K1 + K1·K2) with
K_i = (a_i/b_i)·exp(2·z_i·V/25.7) (common practice).

    python examples/channel_voltage.py [N]     # N voltages (default 181)

Writes channel_voltage.png in the current folder.
"""

import os
import sys
from pathlib import Path

import numpy as np

from treeflux.compiler import compile_scheme, load
from treeflux.runtime.analysis import response_curve
from treeflux.runtime.safe_io import output_path

HERE = Path(__file__).resolve().parent
VT = 25.7        # mV, k_B T / e near 25 °C (common practice)


def closed_form(model, V):
    d = model.info.defaults
    K1 = d["a1"] / d["b1"] * np.exp(2 * d["z1"] * V / VT)
    K2 = d["a2"] / d["b2"] * np.exp(2 * d["z2"] * V / VT)
    return K1 * K2 / (1 + K1 + K1 * K2)


def main(points):
    model = compile_scheme(load(HERE / "channel_voltage.toml"))
    r = response_curve(model, observable="open", input="V", lo=-120.0, hi=60.0, points=points)
    V, p_open = np.array(r["curve"]["x"]), np.array(r["curve"]["y"])
    worst = float(np.max(np.abs(p_open - closed_form(model, V))))
    P = model.steady_state({"V": V})

    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    for k, s in enumerate(model.states):
        ax.plot(V, P[:, k], lw=1.2, ls=":" if s != "O" else "-", color=f"C{k}",
                label=f"p({s})" + (" = open probability" if s == "O" else ""))
    fit = r["logistic_fit"]
    ax.axvline(fit["x_half"], color="grey", lw=0.6, label=f"V_half = {fit['x_half']:.1f} mV")
    ax.set_xlabel("membrane potential V (mV)")
    ax.set_ylabel("steady-state occupancy")
    ax.set_title("Model predictions (invented channel): steady-state activation", fontsize=10)
    ax.legend(fontsize="small")
    fig.tight_layout()
    with output_path("channel_voltage.png") as tmp:
        fig.savefig(tmp, dpi=120)
    plt.close(fig)

    print(f"RESULT channel activation over V in [-120, 60] mV at {points} points (model predictions): "
          f"open probability {p_open[0]:.3g} at -120 mV, {p_open[-1]:.3g} at 60 mV; V_half "
          f"{fit['x_half']:.2f} mV (EC50 {r['ec50']:.2f} mV), slope factor {fit['slope_factor']:.2f} mV; "
          f"largest difference from the closed form {worst:.1e}; figure channel_voltage.png")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else int(os.environ.get("TREEFLUX_EXAMPLE_SAMPLES", 181)))
