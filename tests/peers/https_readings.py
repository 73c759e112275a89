"""An analyzer's reading endpoint over HTTPS: Python's http.server behind Python's ssl,
serving {"plant": {"y": 7.5}} with the certificate and key given, on a loopback port
chosen by the OS. Prints {"port": N} once listening; stops when stdin closes.

    https_readings.py CERT KEY
"""

import http.server
import json
import ssl
import sys
import threading


class Readings(http.server.BaseHTTPRequestHandler):
    def do_GET(self):
        body = json.dumps({"plant": {"y": 7.5}}).encode()
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args):
        pass


def main():
    cert, key = sys.argv[1], sys.argv[2]
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Readings)
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    context.load_cert_chain(cert, key)
    server.socket = context.wrap_socket(server.socket, server_side=True)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    print(json.dumps({"port": server.server_address[1]}), flush=True)
    sys.stdin.read()
    server.shutdown()


if __name__ == "__main__":
    main()
