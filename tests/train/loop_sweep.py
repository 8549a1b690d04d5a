"""The small digits sweep that the loop and checkpoint tests train (our own test data)."""

SWEEP = """
[sweep]
name = "loop"
seeds = [0]

[data]
source = "digits"
train_size = 160
val_size = 100
test_size = 100

[network]
kernel = "3"
dropout = 0.2          # draws from the global generator: resume must restore it
[network.stem]
out_ch = 8
[[network.stages]]
out_ch = 8
n_convs = 1
[[network.stages]]
out_ch = 16
n_convs = 1
down = "maxpool"

[recipe]
epochs = 3
batch_size = 32
lr = 0.05
warmup_epochs = 0.5
[recipe.augment]
crop_padding = 1
hflip = true

[[plan]]
name = "all-3"
body = "3"

[[plan]]
name = "stem-5"
stem = "5"
"""
