"""Writes the two bodies of the HTTP latency benchmark: one DPP request with N candidates of
dimension D (k = K, lambda = 0.3), once with JSON-array embeddings and once with embedding_b64.
Deterministic (seeded); invented catalogue of an outdoor-gear shop.
Usage: python3 make_requests.py OUT_DIR [N D K]"""
import base64, json, random, struct, sys

out = sys.argv[1]
n, d, k = (int(x) for x in (sys.argv[2:5] or (500, 64, 50)))
rng = random.Random(42)
cats = ["tents", "stoves", "footwear", "packs", "navigation", "apparel"]
centres = {c: [rng.gauss(0, 1) for _ in range(d)] for c in cats}
json_cands, b64_cands = [], []
for i in range(n):
    cat = cats[i % len(cats)]
    # Round through f32 so both bodies carry exactly the same values.
    e = [struct.unpack("<f", struct.pack("<f", x + 0.5 * rng.gauss(0, 1)))[0] for x in centres[cat]]
    base = {"id": f"{cat[:-1]}-{i:04d}", "score": round(rng.random(), 6), "category": cat}
    json_cands.append({**base, "embedding": e})
    b64_cands.append({**base, "embedding_b64": base64.b64encode(struct.pack(f"<{d}f", *e)).decode()})
for name, cands in (("json", json_cands), ("b64", b64_cands)):
    body = {"algorithm": "dpp", "lambda": 0.3, "k": k, "candidates": cands}
    with open(f"{out}/rerank-{name}.json", "w") as f:
        json.dump(body, f, separators=(",", ":"))
