#!/usr/bin/env python3
"""Runs the slow part of `tagweave scan` (and of coding after `train`) on a Dask cluster.

Every worker runs the `tagweave` binary on one part of the folder and writes a Parquet file
into a work folder; this driver then merges the files into the folder's store. The photo
folder and the work folder must be at the same path on every worker and on this machine
(a shared or network file system). See README.md beside this file.

Steps: `tagweave shard learn` (here), `tagweave shard describe` (one task a part), `tagweave
shard merge` (here); with --train: `tagweave train` (here), `tagweave shard model` (here),
`tagweave shard code` (one task a part), `tagweave shard merge` (here).

A task whose worker dies is started again on another worker by Dask itself (its
`allowed-failures`, 3 by default); a part file appears under its final name only once whole,
so a task cut short leaves nothing the merge could take.
"""

import argparse
import json
import os
import subprocess
import sys
import time


def run_tagweave(binary, args, threads=None):
    """Runs the binary; exit 0 and 3 (done, some files skipped) are success."""
    env = dict(os.environ)
    if threads is not None:
        env["RAYON_NUM_THREADS"] = str(threads)
    done = subprocess.run([binary, *args], capture_output=True, text=True, env=env)
    if done.returncode not in (0, 3):
        raise RuntimeError(
            f"tagweave {' '.join(args)} failed (exit {done.returncode}):\n{done.stderr}"
        )
    return done.stdout


def describe_part(binary, folder, extractor, part, parts, out, threads):
    """One task: describe part `part` of `parts` into `out`; returns its summary."""
    stdout = run_tagweave(
        binary,
        ["shard", "describe", folder, "--extractor", extractor,
         "--part", f"{part}/{parts}", "--out", out, "--json"],
        threads,
    )
    return json.loads(stdout)


def code_part(binary, model, features, out, threads):
    """One task: code the pictures of one features file into `out`."""
    stdout = run_tagweave(
        binary,
        ["shard", "code", "--model", model, "--features", features, "--out", out, "--json"],
        threads,
    )
    return json.loads(stdout)


STARTED = time.time()


def say(message):
    print(f"[{time.time() - STARTED:6.1f} s] {message}", file=sys.stderr, flush=True)


def fan_out(client, function, jobs, name):
    """Submits one task a job and waits for all of them; returns their results in order."""
    futures = [
        client.submit(function, *job, key=f"{name}-{index}", pure=False)
        for index, job in enumerate(jobs)
    ]
    return client.gather(futures)


class LocalCluster:
    """A scheduler and separate worker processes on 127.0.0.1, each worker one thread."""

    def __init__(self, workers, port):
        bin_dir = os.path.dirname(sys.executable)
        dask = os.path.join(bin_dir, "dask")
        self.address = f"tcp://127.0.0.1:{port}"
        quiet = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self.processes = [subprocess.Popen(
            [dask, "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
            **quiet)]
        env = dict(os.environ, RAYON_NUM_THREADS="1")
        for _ in range(workers):
            self.processes.append(subprocess.Popen(
                [dask, "worker", self.address, "--nthreads", "1", "--no-nanny",
                 "--host", "127.0.0.1", "--no-dashboard"], env=env, **quiet))

    def close(self):
        """Gives the processes a moment to end after the client's shutdown, then kills the
        rest: the work is on disk by now, and a worker told to stop while its scheduler goes
        away can spend many seconds trying to say goodbye."""
        deadline = time.time() + 3
        for process in self.processes:
            try:
                process.wait(timeout=max(0.0, deadline - time.time()))
            except subprocess.TimeoutExpired:
                pass
        for process in self.processes:
            if process.poll() is None:
                process.kill()
            process.wait()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", help="the photo folder, at the same path on every worker")
    parser.add_argument("--work", required=True,
                        help="folder for the extractor, model and part files, seen by every worker")
    parser.add_argument("--parts", type=int, required=True, help="how many parts")
    where = parser.add_mutually_exclusive_group(required=True)
    where.add_argument("--scheduler", help="address of a running Dask scheduler")
    where.add_argument("--local-workers", type=int,
                       help="start a scheduler and this many one-thread workers here")
    parser.add_argument("--port", type=int, default=8786, help="scheduler port for --local-workers")
    parser.add_argument("--tagweave", default="tagweave",
                        help="the tagweave binary, at the same path on every worker")
    parser.add_argument("--threads", type=int, default=None,
                        help="RAYON_NUM_THREADS for each part (default: the worker's setting)")
    parser.add_argument("--seed", default="7", help="seed for learning the extractor")
    parser.add_argument("--train", action="store_true",
                        help="then train here and code the parts on the cluster")
    parser.add_argument("--workers", type=int, default=1,
                        help="wait for this many workers before starting")
    options = parser.parse_args()

    from distributed import Client  # imported here so --help works without Dask

    started = STARTED
    folder = os.path.abspath(options.folder)
    work = os.path.abspath(options.work)
    os.makedirs(work, exist_ok=True)
    binary = options.tagweave
    local = None
    if options.local_workers:
        local = LocalCluster(options.local_workers, options.port)
        address, wanted = local.address, options.local_workers
    else:
        address, wanted = options.scheduler, options.workers
    try:
        client = Client(address, timeout=60)
        client.wait_for_workers(wanted, timeout=120)
        ready = time.time()
        say(f"cluster ready: {len(client.scheduler_info()['workers'])} workers "
            f"({ready - started:.1f} s)")

        extractor = os.path.join(work, "extractor.json")
        run_tagweave(binary, ["shard", "learn", folder, "--out", extractor,
                              "--seed", options.seed])
        say("extractor learned")
        parts = range(1, options.parts + 1)
        feature_files = [os.path.join(work, f"features-{k}.parquet") for k in parts]
        described = fan_out(
            client, describe_part,
            [(binary, folder, extractor, k, options.parts, out, options.threads)
             for k, out in zip(parts, feature_files)],
            "describe")
        skipped = sum(len(d.get("skipped_files", [])) for d in described)
        say(f"{options.parts} parts described ({sum(d['described'] for d in described)} "
            f"pictures, {skipped} skipped)")
        merged = json.loads(run_tagweave(
            binary, ["shard", "merge", folder, "--extractor", extractor, "--json",
                     *feature_files]))
        say(f"features merged ({sum(f['written'] for f in merged['files'])} written)")

        if options.train:
            run_tagweave(binary, ["train", "--store", folder, "--json"])
            model = os.path.join(work, "model.bin")
            run_tagweave(binary, ["shard", "model", "--store", folder, "--out", model])
            code_files = [os.path.join(work, f"codes-{k}.parquet") for k in parts]
            fan_out(client, code_part,
                    [(binary, model, features, out, options.threads)
                     for features, out in zip(feature_files, code_files)],
                    "code")
            merged_codes = json.loads(run_tagweave(
                binary, ["shard", "merge", folder, "--json", *code_files]))
            say("trained; codes merged "
                f"({sum(f['unchanged'] for f in merged_codes['files'])} as trained)")
        if local is not None:
            client.shutdown()  # scheduler and workers stop at once
        else:
            client.close()
    finally:
        if local is not None:
            local.close()
    print(json.dumps({"parts": options.parts, "seconds": round(time.time() - started, 2),
                      "describe": described}))


if __name__ == "__main__":
    main()
