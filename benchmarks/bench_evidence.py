"""Benchmark of the evidence layer (prints; asserts nothing).

Targets (issue "Evidence that holds up"):
- 10,000 work records registered and stamped with one Merkle root: under 10 s;
- one inclusion proof verified: under 10 ms.

Run: ``python benchmarks/bench_evidence.py [N]``. Needs the ``openssl`` command
(the timestamp authority is a local ``openssl ts -reply``, as in the tests).
The profile uses the lowered test KDF (``CLAIMKIT_TEST_FAST_KDF=1``): opening a
profile is not what is measured here.
"""

from __future__ import annotations

import hashlib
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ["CLAIMKIT_TEST_FAST_KDF"] = "1"
sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from conftest import make_local_tsa

from claimkit.evidence import merkle
from claimkit.evidence.profile import Profile
from claimkit.evidence.stamping import check_stamp, inclusion_proof


def main(n: int = 10_000) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        tsa = make_local_tsa(tmp / "tsa")
        p = Profile.create(tmp / "home", "Ilse Marrow", b"bench-passphrase")

        t0 = time.perf_counter()
        serials = p.allocate_serials(n)
        batch = 500
        for i in range(0, n, batch):
            p.register_works([{
                "serial": s, "sha256_original": hashlib.sha256(b"o%d" % s).hexdigest(),
                "sha256_marked": hashlib.sha256(b"m%d" % s).hexdigest(),
                "original_name": f"harwick-bay-{s:05d}.tif",
                "marked_name": f"harwick-bay-{s:05d}.jpg",
                "fingerprint": f"{s * 2654435761 % 2**64:016x}",
                "mark_params": {"strength": 1.0, "tile": 128, "payload_bits": 64},
                "capture": {"DateTimeOriginal": "2026:05:04 06:30:00", "Make": "Fictional"},
                "quality": {"psnr_db": 43.1 + s % 7 / 10, "ssim": 0.991}}
                for s in serials[i:i + batch]])
        t1 = time.perf_counter()
        req = p.stamp_request()
        t2 = time.perf_counter()
        tsr = tsa.reply(req.tsq)
        t3 = time.perf_counter()
        res = p.stamp_attach(tsr, tsa.ca_cert.read_bytes())
        t4 = time.perf_counter()
        assert len(res.work_ids) == n

        # One inclusion proof, as an outside verifier has it.
        work = p.work(res.work_ids[n // 3])
        proof = inclusion_proof(p, work.work_id, res.token_id)["proof"]
        path = [bytes.fromhex(h) for h in proof["audit_path"]]
        root = bytes.fromhex(proof["merkle_root"])
        reps = 2000
        t5 = time.perf_counter()
        for _ in range(reps):
            ok = merkle.verify_inclusion(work.canonical, proof["leaf_index"], proof["tree_size"],
                                         path, root)
        t6 = time.perf_counter()
        assert ok
        t7 = time.perf_counter()
        st = check_stamp(p, work, res.token_id)  # token signature + chain + proof, from storage
        t8 = time.perf_counter()
        assert st.ok

        # One-at-a-time registration, as `claimkit mark` does it per file.
        single = p.allocate_serials(100)
        t9 = time.perf_counter()
        for s in single:
            p.register_work(s, sha256_original=hashlib.sha256(b"x%d" % s).hexdigest(),
                            sha256_marked=hashlib.sha256(b"y%d" % s).hexdigest(),
                            original_name="a.tif", marked_name="a.jpg", fingerprint="00" * 8,
                            mark_params={}, capture={}, quality={})
        t10 = time.perf_counter()
        p.close()

    total = t4 - t0
    one_proof_ms = (t6 - t5) / reps * 1000
    print(f"records: {n}, Merkle tree depth {len(path)}")
    print(f"  register (batches of {batch}, signed, logged): {t1 - t0:7.3f} s")
    print(f"  stamp request (Merkle root + TimeStampReq):    {t2 - t1:7.3f} s")
    print(f"  local TSA reply (openssl ts -reply):           {t3 - t2:7.3f} s")
    print(f"  stamp attach (all checks + {n} proofs stored): {t4 - t3:7.3f} s")
    print(f"  total register + stamp: {total:.3f} s   target 10 s   ratio {total / 10:.3f}")
    print(f"  verify one inclusion proof: {one_proof_ms:.4f} ms   target 10 ms   "
          f"ratio {one_proof_ms / 10:.5f}")
    print(f"  re-check one stored token + proof (full RFC 3161 checks): "
          f"{(t8 - t7) * 1000:.2f} ms")
    print(f"  one-at-a-time register_work: {(t10 - t9) / 100 * 1000:.2f} ms per record")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 10_000)
