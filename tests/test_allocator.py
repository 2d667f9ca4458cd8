"""The allocator setting keeps freed blocks for reuse: threads that allocate and free megabyte blocks over and
over (as row streaming's workers do) stop taking fresh pages from the kernel."""

import platform
import subprocess
import sys
import textwrap

import pytest

SCRIPT = textwrap.dedent("""
    import resource, threading
    from fcnkit.allocator import reuse_freed_memory
    assert reuse_freed_memory()
    import torch
    torch.set_num_threads(1)

    def work():
        keep = []
        for i in range(30):
            keep.append(torch.ones((4 + i % 3) << 20, dtype=torch.uint8))  # 4-6 MB, every page written
            if len(keep) > 3:
                keep.pop(0)

    def run():  # new threads each time, as each streamed image gets
        threads = [threading.Thread(target=work) for _ in range(2)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()

    run()
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(3):
        run()
    print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
""")


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the setting is glibc's")
def test_freed_blocks_are_reused_instead_of_faulted_in_afresh():
    # Reference: the kernel's count of minor page faults (getrusage ru_minflt, POSIX). 3 runs x 2 threads x 30
    # blocks of 5 MB on average write about 230 000 pages; blocks kept for reuse are faulted in once.
    pages = 3 * 2 * 30 * (5 << 20) // 4096
    out = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, check=True)
    assert int(out.stdout) < pages // 10
