"""One pipeline-parallel training step as a plain SimPy model.

The peer of baton's whole-process benchmark: the same step written the way a
practitioner would write it with SimPy (one process per device walking its
order of operations, one process per transfer between devices, events for
data that has arrived), so the two can be timed as whole processes on the
same case. It reads the devices' orders from a file written by `baton order`
and prints the step time in nanoseconds, which must equal baton's.

Every virtual stage costs the same (forward and backward times given on the
command line), every transfer between devices takes the link's latency plus
its bytes at the link's bandwidth (rounded up to a whole nanosecond), and no
two transfers share a link (true of the benchmark case).

    python3 pipeline_step.py ORDER_FILE FORWARD_NS BACKWARD_NS LATENCY_NS BYTES BYTES_PER_S
"""

import sys

import simpy


def read_orders(path):
    """Each device's ops as (kind, micro_batch, chunk), in order."""
    orders = []
    with open(path) as f:
        for line in f:
            line = line.split("#", 1)[0].strip()
            if not line:
                continue
            _, ops = line.split(":", 1)
            order = []
            for token in ops.split():
                kind, rest = token[0], token[1:]
                mb, _, chunk = rest.partition(".")
                order.append((kind, int(mb), int(chunk or 0)))
            orders.append(order)
    return orders


def main():
    path, forward_ns, backward_ns, latency_ns, size, bytes_per_s = sys.argv[1:7]
    forward_ns, backward_ns, latency_ns = int(forward_ns), int(backward_ns), int(latency_ns)
    size, bytes_per_s = int(size), int(bytes_per_s)
    orders = read_orders(path)
    p = len(orders)
    chunks = 1 + max(c for order in orders for (_, _, c) in order)
    last = p * chunks - 1
    transfer_ns = latency_ns + -(-size * 1_000_000_000 // bytes_per_s)

    env = simpy.Environment()
    arrived = {}  # (kind, micro_batch, stage) of a consumer -> event: its input is there

    def arrival(key):
        if key not in arrived:
            arrived[key] = env.event()
        return arrived[key]

    def send(key):
        yield env.timeout(transfer_ns)
        arrival(key).succeed()

    def hand_over(key, to_device, from_device):
        if to_device == from_device:
            arrival(key).succeed()
        else:
            env.process(send(key))

    def device(d):
        for kind, mb, chunk in orders[d]:
            stage = chunk * p + d
            if kind == "F":
                if stage > 0:
                    yield arrival(("F", mb, stage))
                yield env.timeout(forward_ns)
                if stage < last:
                    hand_over(("F", mb, stage + 1), (stage + 1) % p, d)
            else:
                if stage < last:
                    yield arrival(("B", mb, stage))
                yield env.timeout(backward_ns)
                if stage > 0:
                    hand_over(("B", mb, stage - 1), (stage - 1) % p, d)

    for d in range(p):
        env.process(device(d))
    env.run()
    print(env.now)


if __name__ == "__main__":
    main()
