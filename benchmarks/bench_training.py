"""asv benchmarks of the training-image builder and statistics.

Run with asv, or directly (``python benchmarks/bench_training.py``) for a quick timing table.
"""

from __future__ import annotations

import numpy as np

from strataloom.training import (
    Bodies,
    Channels,
    Levee,
    PropertyModel,
    build_objects,
    describe,
    gaussian_field,
    property_field,
)

SHAPE = (50, 200, 200)  # nz, ny, nx: the benchmark size
SPACING = (1.0, 10.0, 10.0)


def channel_groups() -> list:
    """Sinuous channels with levees at 25 % (invented demo values)."""
    return [Channels(facies=1, proportion=0.25, width={"uniform": [60.0, 120.0]},
                     thickness={"triangular": [3.0, 4.5, 6.0]}, azimuth={"normal": [30.0, 8.0]},
                     wavelength={"uniform": [800.0, 1400.0]}, amplitude={"uniform": [60.0, 180.0]},
                     levee=Levee(2, {"uniform": [30.0, 60.0]}, 2.0))]


class TimeChannelTI:
    """Build time of a 200 x 200 x 50 channel training image."""

    timeout = 300

    def time_channels_200x200x50(self) -> None:
        build_objects(SHAPE, channel_groups(), spacing=SPACING, seed=1)

    def time_channels_and_lobes_200x200x50(self) -> None:
        build_objects(SHAPE, [Bodies("lobe", 3, 0.08, length={"uniform": [200.0, 400.0]},
                                     width={"uniform": [100.0, 200.0]}, thickness=2.0),
                              *channel_groups()], spacing=SPACING, seed=1,
                      erosion_order=["lobes", "channels"])


class TimeFieldsAndStats:
    """Property fields and statistics on the same grid."""

    timeout = 300

    def setup(self) -> None:
        self.facies = build_objects(SHAPE, channel_groups(), spacing=SPACING, seed=1).facies

    def time_gaussian_field_200x200x50(self) -> None:
        gaussian_field(SHAPE, range=(4.0, 600.0, 150.0), azimuth=30.0, spacing=SPACING, seed=2)

    def time_property_field_3_facies(self) -> None:
        models = {k: PropertyModel(0.1 + 0.05 * k, 0.02, (3.0, 300.0, 300.0)) for k in range(3)}
        property_field(self.facies, models, spacing=SPACING, seed=3)

    def time_describe(self) -> None:
        describe(self.facies, spacing=SPACING)


if __name__ == "__main__":
    import time

    for cls in (TimeChannelTI, TimeFieldsAndStats):
        bench = cls()
        if hasattr(bench, "setup"):
            bench.setup()
        for name in sorted(n for n in dir(bench) if n.startswith("time_")):
            runs = []
            for _ in range(3):
                t0 = time.perf_counter()
                getattr(bench, name)()
                runs.append(time.perf_counter() - t0)
            print(f"{cls.__name__}.{name}: best {min(runs):.3f} s, median {np.median(runs):.3f} s")
