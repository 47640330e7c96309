"""Running a command as a real process and acting on it (a signal, a killed
worker) once its progress lines say it is under way."""

import queue
import signal
import subprocess
import threading


def default_sigint():
    # the child must take Ctrl-C even when the tests run with SIGINT ignored
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def run_until(argv, prefix: str, count: int, action):
    """Run the command; when `count` stderr lines start with `prefix`, call
    action(proc) once; (exit code, stdout, stderr)."""
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=default_sigint)
    lines: queue.Queue = queue.Queue()
    reader = threading.Thread(target=lambda: [lines.put(line) for line in proc.stderr], daemon=True)
    reader.start()
    seen, err = 0, []
    try:
        while seen < count:
            err.append(lines.get(timeout=300))
            seen += err[-1].startswith(prefix)
        action(proc)
        code = proc.wait(timeout=300)
        out = proc.stdout.read()
    finally:
        if proc.poll() is None:
            proc.kill()
    reader.join(timeout=10)
    while not lines.empty():
        err.append(lines.get_nowait())
    return code, out, "".join(err)
