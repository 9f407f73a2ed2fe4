"""Reproduces medley's arm assignment offline (the README's snippet, runnable).
Usage: python3 docs/arm_bucket.py SLICE UNIT_ID TOTAL_WEIGHT  -> prints the bucket in 0..TOTAL_WEIGHT-1;
the unit's arm is the first whose cumulative weight exceeds it, in configured order."""
import sys


def arm_bucket(slice_name: str, unit_id: str, total_weight: int) -> int:
    h = 0xcbf29ce484222325                                   # FNV-1a 64 ...
    for b in slice_name.encode() + b"\x00" + unit_id.encode():
        h = ((h ^ b) * 0x100000001b3) & 0xFFFFFFFFFFFFFFFF
    h = ((h ^ (h >> 30)) * 0xbf58476d1ce4e5b9) & 0xFFFFFFFFFFFFFFFF   # ... SplitMix64 finaliser
    h = ((h ^ (h >> 27)) * 0x94d049bb133111eb) & 0xFFFFFFFFFFFFFFFF
    h ^= h >> 31
    return (h * total_weight) >> 64                          # 0..total_weight-1; walk the arms in order


if __name__ == "__main__":
    print(arm_bucket(sys.argv[1], sys.argv[2], int(sys.argv[3])))
