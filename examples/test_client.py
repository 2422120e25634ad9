"""The Python client's retry on 503, against a small local HTTP server (standard library
only): it waits as Retry-After says, within its bounds, and gives up after its attempts.
Run: python3 -m unittest discover -s examples -p 'test_*.py'"""

import email.utils
import http.server
import json
import threading
import time
import unittest

from client import Client, Refused


class Busy(http.server.BaseHTTPRequestHandler):
    """Answers 503 with the class's `retry_after` for the first `busy` requests, then 200."""

    busy = 1
    retry_after = "2"
    seen = 0

    def do_POST(self):
        length = int(self.headers.get("content-length", 0))
        body = json.loads(self.rfile.read(length) or b"null")
        type(self).seen += 1
        if type(self).seen <= type(self).busy:
            self.send_response(503)
            if type(self).retry_after is not None:
                self.send_header("Retry-After", type(self).retry_after)
            self.send_header("content-type", "application/problem+json")
            self.end_headers()
            self.wfile.write(b'{"status": 503, "detail": "busy"}')
            return
        self.send_response(200)
        self.send_header("content-type", "application/json")
        self.end_headers()
        self.wfile.write(json.dumps({"echo": body}).encode())

    def log_message(self, *args):
        pass


class RetryTest(unittest.TestCase):
    def serve(self, busy, retry_after):
        handler = type("Handler", (Busy,), {"busy": busy, "retry_after": retry_after, "seen": 0})
        server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
        threading.Thread(target=server.serve_forever, daemon=True).start()
        self.addCleanup(server.server_close)
        self.addCleanup(server.shutdown)
        self.waits = []
        client = Client(f"http://127.0.0.1:{server.server_address[1]}", attempts=4,
                        max_wait=30.0, sleep=self.waits.append)
        return client, handler

    def test_a_503_is_retried_after_the_seconds_retry_after_gives(self):
        client, handler = self.serve(busy=2, retry_after="2")
        self.assertEqual(client.call("POST", "/v1/score", {"x": 1}), {"echo": {"x": 1}})
        self.assertEqual(self.waits, [2.0, 2.0])
        self.assertEqual(handler.seen, 3)

    def test_without_retry_after_the_default_wait_and_a_long_one_is_capped(self):
        client, _ = self.serve(busy=1, retry_after=None)
        client.call("POST", "/v1/score", {})
        self.assertEqual(self.waits, [1.0])
        client, _ = self.serve(busy=1, retry_after="3600")
        client.call("POST", "/v1/score", {})
        self.assertEqual(self.waits, [30.0])

    def test_an_http_date_retry_after_is_honoured(self):
        later = email.utils.formatdate(time.time() + 20, usegmt=True)
        client, _ = self.serve(busy=1, retry_after=later)
        client.call("POST", "/v1/score", {})
        self.assertEqual(len(self.waits), 1)
        self.assertTrue(15.0 <= self.waits[0] <= 20.0, self.waits)

    def test_after_the_last_attempt_the_refusal_is_raised_with_the_problem(self):
        client, handler = self.serve(busy=10, retry_after="1")
        with self.assertRaises(Refused) as raised:
            client.call("POST", "/v1/score", {})
        self.assertEqual(raised.exception.status, 503)
        self.assertEqual(raised.exception.problem["detail"], "busy")
        self.assertEqual(handler.seen, 4)
        self.assertEqual(self.waits, [1.0, 1.0, 1.0])


if __name__ == "__main__":
    unittest.main()
