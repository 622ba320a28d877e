"""Default values of the options, in one place the command line can read without heavy imports."""

MIN_SIDE = 32  # 32x32 colour images are the smallest input of common classification benchmarks (common practice)
MAX_PIXELS = 89_478_485  # Pillow's documented Image.MAX_IMAGE_PIXELS (decompression-bomb guard)
MAX_DISTANCE = 8  # Hamming radius on 64-bit pHash; see README "Near-duplicates" for how it was chosen
RATIOS = (0.8, 0.1, 0.1)
SEED = 0
