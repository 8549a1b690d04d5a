"""The upper bounds on every sweep value that allocates memory or names a file.

A sweep file is checked against these caps when it is loaded, before anything is built, so a
typo such as ``out_ch = 1000000000`` or a 40-digit kernel is refused in milliseconds with the
key's name, not after minutes of planning or an allocation the machine cannot make. The caps
are generous for compact CNNs on a CPU; sweeps/README.md lists each one (keep the two in step).
Values that depend on the data (a kernel's extent, the crop padding) are checked again against
the input size once the data's shape is known (`check_input_bounds`).
"""

from __future__ import annotations

from kablate.errors import SweepError

MAX_NAME = 100  # characters in a sweep or plan name; results/<name>/ must be a legal file name
MAX_SEED = 2**31 - 1  # seeds and split_seed; every generator we seed accepts this range
MAX_CHANNELS = 4096  # out_ch of the stem and of every stage
MAX_BATCH = 65_536  # recipe.batch_size
MAX_KERNEL = 255  # a kernel size, a dilation or a bottleneck ratio in a kernel spec
MAX_SPEC_DIGITS = 3  # digits of one number in a kernel spec (so "10001" fails before int())
MAX_CROP_PADDING = 64  # recipe.augment.crop_padding, before the input check below
MAX_STAGES = 64  # [[network.stages]] tables
MAX_CONVS = 64  # n_convs of one stage
MAX_GRID_CELLS = 10_000  # cells of all [[grid]] tables of a sweep together
MAX_DEPTH = 16  # nesting of tables and arrays in a sweep or config file
MAX_STRIDE = 64  # the stem's stride: [network.stem] stride, or a plan's "s" part ("11s4")
MAX_THREADS = 1024  # target.threads
MAX_SIDE = 4096  # target.input: the height and width latency is measured at


def check_input_bounds(sweep, in_shape: tuple[int, int, int]) -> None:
    """Refuse settings that are too large for the data's images.

    A kernel's extent is checked per layer by `kablate.nets.layout`; this checks the recipe.

    Raises:
        SweepError: ``recipe.augment.crop_padding`` is not below the image's side, so that a
            crop could hold no pixel of the image at all.
    """
    side = min(in_shape[1], in_shape[2])
    padding = sweep.recipe.augment.crop_padding
    if padding >= side:
        raise SweepError(
            sweep.source,
            "recipe.augment.crop_padding",
            f"must be smaller than the images' side ({side} px, so at most {side - 1}): a "
            f"crop after padding by {padding} could hold no pixel of the image",
        )
