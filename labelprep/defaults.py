"""Default values of the options, in one place the command line can read without heavy imports."""

MIN_SIDE = 32  # 32x32 colour images are the smallest input of common classification benchmarks (common practice)
MAX_PIXELS = 89_478_485  # Pillow's documented Image.MAX_IMAGE_PIXELS (decompression-bomb guard)
MAX_DISTANCE = 8  # Hamming radius on 64-bit pHash; see README "Near-duplicates" for how it was chosen
RATIOS = (0.8, 0.1, 0.1)
SEED = 0
# 3:1 sits above every usual camera and screen shape (4:3, 3:2, 16:9, 21:9 = 2.33; from memory),
# so only strips, banners and panoramas are flagged
MAX_ASPECT = 3.0
# luminance std (0-255) on the 32x32 hash thumbnail (hashing.py): flat frames with sensor noise measure under 1, the
# lowest photo bundled with scikit-image (microaneurysms.png) 9.8; tests/test_checks.py pins both
MIN_SPREAD = 2.0
# seconds one file may take to read and decode before it is given up as "timeout": a budget-sized
# (89 MP) PNG decodes in well under 10 s on one core of this project's 2-core machine, so only a
# file that makes the decoder spin reaches it
PROBE_SECONDS = 60.0
# archives read in place (labelprep.sources): a member is read into memory whole, as a file is, so
# its declared size has a budget; 512 MiB holds a budget-sized image even uncompressed (89 MP x 3
# bytes = 268 MB)
MEMBER_BYTES = 512 * 2**20
# a member expanding over 100x its compressed size is refused as a compression bomb (common
# practice: Apache POI's ZipSecureFile refuses entries under a 0.01 inflate ratio, from memory);
# members up to 1 MiB are exempt, as a flat image may compress that well and costs nothing
MAX_RATIO = 100
RATIO_GRACE = 2**20
# a split whose share of the rows is this far from its ratio misses it (labelprep.split_diagnosis);
# the size-deviation target of benchmarks/split_quality.py
SPLIT_TOLERANCE = 0.02
