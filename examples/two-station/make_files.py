"""Write the invented two-station example run (station-a.csv, station-b.csv).

INVENTED DATA: simulated honest quantum devices (dicert's simulator, fixed seed), written the
way a two-station experiment might log them: each station its own file, a sync-pulse number
as the trial key (consecutive pulses), settings coded 1/2, outcomes coded +1/-1, a timestamp
column, three trials that station B failed to record and one that neither station recorded
(a gap in the pulse numbers). Re-running this script reproduces the files byte for byte.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from dicert.simulate import device_model, simulate_trials

HERE = Path(__file__).resolve().parent
TRIALS = 4000
MISSING_AT_B = (1013, 2207, 3391)  # trials station B did not record
MISSING_AT_BOTH = (2800,)  # a trial neither station recorded


def main() -> None:
    arr = simulate_trials(TRIALS, device_model("quantum"), rng=np.random.default_rng(20261202))
    pulse = np.arange(1, TRIALS + 1) + 100_000  # sync-pulse numbers 100001..104000
    t_ps = pulse.astype(np.int64) * 12_500
    sign = np.array(["+1", "-1"])
    gap = {100_000 + p for p in MISSING_AT_BOTH}
    with open(HERE / "station-a.csv", "w", newline="\n") as fh:
        fh.write("# INVENTED example data (simulated), station A\n")
        fh.write("sync_pulse,time_ps,basis_choice,detector_result\n")
        for i in range(TRIALS):
            if int(pulse[i]) in gap:
                continue
            fh.write(f"{pulse[i]},{t_ps[i] + 3},{arr.x[i] + 1},{sign[arr.a[i]]}\n")
    skip = gap | {100_000 + p for p in MISSING_AT_B}
    with open(HERE / "station-b.csv", "w", newline="\n") as fh:
        fh.write("# INVENTED example data (simulated), station B\n")
        fh.write("sync_pulse,time_ps,basis_choice,detector_result\n")
        for i in range(TRIALS):
            if int(pulse[i]) in skip:
                continue
            fh.write(f"{pulse[i]},{t_ps[i] + 41},{arr.y[i] + 1},{sign[arr.b[i]]}\n")


if __name__ == "__main__":
    main()
