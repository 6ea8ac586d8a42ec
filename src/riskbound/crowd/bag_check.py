"""`riskbound bagcheck BAG`: read a crowd bag completely and say what it holds.

Prints the storage format, each topic's message count, the truth frames (span, distinct walkers,
walkers per frame) and the bag's metadata. A bag that cannot be read to the end (truncated,
corrupted, not a bag) is reported in one line on stderr with exit status 2.
"""

import sys
from pathlib import Path

from riskbound.logs import bag_io

EXIT_ERROR = 2


def add_arguments(parser):
    parser.epilog = "exit codes: 0 read completely; 2 missing, damaged or not a bag (one line on stderr)"
    parser.add_argument("bag", help="bag directory, or its .mcap/.db3 file")


def run(args):
    try:
        return _check(Path(args.bag))
    except (ValueError, bag_io.BagError, OSError) as error:
        print(f"riskbound bagcheck: error: {error}", file=sys.stderr)
        return EXIT_ERROR


def _check(path):
    bag = bag_io.read_crowd_bag(path)
    truth_counts = [len(ids) for ids in bag.truth_ids]
    walkers = len(set().union(*[set(ids.tolist()) for ids in bag.truth_ids])) if bag.truth_ids else 0
    span = (bag.truth.stamps_s[-1] - bag.truth.stamps_s[0]) if len(bag.truth) else 0.0
    print(f"{path} ({bag.storage})")
    for topic, count in sorted(bag.message_counts.items()):
        print(f"  {topic}: {count} messages")
    print(f"  {len(bag.truth)} truth frames over {span:.1f} s, {walkers} distinct walkers, "
          f"{min(truth_counts, default=0)}-{max(truth_counts, default=0)} per frame")
    for key, value in sorted(bag.metadata.items()):
        print(f"  {key}: {value}")
    return 0
