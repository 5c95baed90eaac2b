/* example_board.c - the smallest use of the receive path and the codec on a board.
 *
 * Not the protocol server (a later part of protocol/c/): it shows the wiring only, and is what
 * tests/bench/c_board.py builds for Cortex-M4 to measure code size and static RAM. The UART
 * receive interrupt pushes each byte into the ring; the control tick drains the ring through the
 * decoder and answers every decoded request with an Ack (a real board runs the protocol server
 * here), then sends one telemetry sample.
 *
 * The integrator provides board_uart_send (its UART or DMA transmit; it must not block the tick)
 * and calls board_uart_rx_isr from its receive interrupt. With TL_EXAMPLE_MAIN defined a stub
 * transmit and a main loop are added so that the file links on its own.
 */
#include "tl_frame.h"

void board_uart_send(const uint8_t *data, size_t n);
void board_uart_rx_isr(uint8_t byte);
void board_init(void);
void board_tick(uint64_t time_us, const float *rate, const float *rate_setpoint,
                const float *output);

static tl_ring rx_ring;         /* filled by the interrupt, drained by the tick */
static tl_decoder rx_decoder;   /* one piece of at most TL_MAX_ENCODED bytes, the counters */
static tl_frame rx_frame;       /* the frame handed up, decoded */
static tl_message tx_message;   /* a message being encoded */
static uint8_t tx_wire[TL_MAX_WIRE];
static uint16_t device_seq;     /* own sequence counter of Telemetry and Event frames */
static uint32_t telemetry_counter;

void board_uart_rx_isr(uint8_t byte)
{
    (void)tl_ring_push(&rx_ring, byte); /* a full ring drops and counts the byte */
}

void board_init(void)
{
    tl_ring_init(&rx_ring);
    tl_decoder_init(&rx_decoder);
}

void board_tick(uint64_t time_us, const float *rate, const float *rate_setpoint,
                const float *output)
{
    int n;
    uint8_t a;
    while (tl_rx_poll(&rx_ring, &rx_decoder, &rx_frame)) {
        if (rx_frame.kind != TL_FRAME_GOOD || rx_frame.type_id == TL_MSG_KEEPALIVE)
            continue;
        tx_message.type_id = TL_MSG_ACK;
        tx_message.body.ack.acked_type = rx_frame.type_id;
        tx_message.body.ack.state = TL_DEVICE_STATE_DISARMED;
        n = tl_encode_message(&tx_message, rx_frame.seq, TL_FLAG_REPLY, tx_wire, sizeof tx_wire);
        if (n > 0)
            board_uart_send(tx_wire, (size_t)n);
    }
    tx_message.type_id = TL_MSG_TELEMETRY;
    tx_message.body.telemetry.time_us = time_us;
    tx_message.body.telemetry.counter = telemetry_counter++;
    tx_message.body.telemetry.state = TL_DEVICE_STATE_DISARMED;
    tx_message.body.telemetry.tag = 0;
    tx_message.body.telemetry.axes.count = 4;
    for (a = 0; a < 4u; a++) {
        tl_axis_sample *s = &tx_message.body.telemetry.axes.items[a];
        s->axis = a;
        s->loop = TL_LOOP_RATE;
        s->setpoint = rate_setpoint[a];
        s->measurement = rate[a];
        s->output = output[a];
        s->relay = 0;
    }
    n = tl_encode_message(&tx_message, device_seq++, 0u, tx_wire, sizeof tx_wire);
    if (n > 0)
        board_uart_send(tx_wire, (size_t)n);
}

#ifdef TL_EXAMPLE_MAIN
static volatile uint8_t uart_data_register;

void board_uart_send(const uint8_t *data, size_t n)
{
    size_t k;
    for (k = 0; k < n; k++)
        uart_data_register = data[k];
}

int main(void)
{
    static const float zero[4] = {0.0f, 0.0f, 0.0f, 0.0f};
    uint64_t t = 0;
    board_init();
    for (;;) {
        board_uart_rx_isr(uart_data_register); /* stands in for the interrupt */
        board_tick(t, zero, zero, zero);
        t += 2500u;
    }
}
#endif
