"""Read freshet's vectors from Redis and rank candidates: Python stdlib only.

usage: python3 reader.py HOST PORT PREFIX USER N ITEM...   (prints "item score")
"""
import json, socket, struct, sys

class Redis:  # the smallest RESP client that will do
    def __init__(self, host, port):
        self.sock = socket.create_connection((host, port))
        self.rd = self.sock.makefile('rb')

    def cmd(self, *args):
        out = [b'*%d\r\n' % len(args)]
        for a in args:
            a = a if isinstance(a, bytes) else str(a).encode()
            out.append(b'$%d\r\n%s\r\n' % (len(a), a))
        self.sock.sendall(b''.join(out))
        return self.reply()

    def reply(self):
        line = self.rd.readline()[:-2]
        kind, rest = line[:1], line[1:]
        if kind == b'$':
            n = int(rest)
            return None if n < 0 else self.rd.read(n + 2)[:-2]
        if kind == b'*':
            return [self.reply() for _ in range(int(rest))]
        if kind in (b'+', b':'):
            return rest
        raise RuntimeError(rest.decode())

def bucket(ident, n):  # FNV-1a 64 of the ID's bytes, mod n
    h = 14695981039346656037
    for c in ident.encode():
        h = ((h ^ c) * 1099511628211) & 0xFFFFFFFFFFFFFFFF
    return h % n

def vector(r, prefix, meta, side, ident):
    key = '%s/v/%d/%s/%d' % (prefix, meta['version'], side, bucket(ident, meta['buckets']))
    val = r.cmd('HGET', key, ident)
    if val is None:
        return None
    enc = meta['encoding']
    factors = struct.unpack_from('<%df' % meta['rank'], val, enc['factors_at'])
    bias = struct.unpack_from('<f', val, enc['bias_at'])[0] if enc['bias_at'] >= 0 else 0.0
    return factors, bias

def top_n(r, prefix, user, items, n):
    version = int(r.cmd('GET', prefix + '/current'))
    meta = json.loads(r.cmd('GET', '%s/v/%d/meta' % (prefix, version)))
    p, bu = vector(r, prefix, meta, 'u', user)
    scored = []
    for item in items:
        got = vector(r, prefix, meta, 'i', item)
        if got is None:
            continue
        q, bi = got
        s = sum(a * b for a, b in zip(p, q))  # r = mu + b_u + b_i + p.q (explicit), p.q (implicit)
        if meta['encoding']['bias_at'] >= 0:
            s += meta['global_mean'] + bu + bi
        scored.append((-s, item))
    return [(item, -s) for s, item in sorted(scored)[:n]]

if __name__ == '__main__':
    host, port, prefix, user, n = sys.argv[1:6]
    for item, score in top_n(Redis(host, int(port)), prefix, user, sys.argv[6:], int(n)):
        print('%s %.17g' % (item, score))
