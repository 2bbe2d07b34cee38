"""The service on a free loopback port, for the measuring scripts (goals.py, scaling.py, answers_snapshot.py).

    from served import Server
    s = Server("target/release/tailtally")    # started; waits for /healthz
    seconds, status, answer = s.post("/v1/tail", body)
    s.stop()

`post` goes over one keep-alive connection (`conn`), so repeated requests time the service, not the TCP
handshake; `base` is the URL for other clients; `proc.pid` is there for /proc readings.
"""
import http.client
import socket
import subprocess
import tempfile
import time


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


class Server:
    def __init__(self, binary, timeout=600):
        self.binary = binary
        self.port = free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.log = tempfile.TemporaryFile()
        self.proc = subprocess.Popen([binary, "serve", "--listen", f"127.0.0.1:{self.port}"],
                                     stdout=self.log, stderr=self.log)
        for _ in range(200):
            try:
                self.get("/healthz")
                break
            except OSError:
                time.sleep(0.05)
        else:
            self.log.seek(0)
            raise RuntimeError(f"{binary} did not start: {self.log.read()[-2000:]!r}")
        self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=timeout)

    def get(self, path):
        c = http.client.HTTPConnection("127.0.0.1", self.port, timeout=5)
        c.request("GET", path)
        r = c.getresponse()
        body = r.read()
        c.close()
        return body

    def post(self, path, body, ctype="application/json"):
        """(seconds, status, answer bytes) over the keep-alive connection."""
        t = time.perf_counter()
        self.conn.request("POST", path, body=body, headers={"Content-Type": ctype})
        r = self.conn.getresponse()
        out = r.read()
        return time.perf_counter() - t, r.status, out

    def stop(self):
        self.conn.close()
        self.proc.terminate()
        self.proc.wait()
