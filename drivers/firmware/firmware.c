/*
 * livefilt reference firmware for an ATmega328P at 16 MHz (avr-libc only).
 *
 * Timer1 ticks at the sample rate.  Each tick starts one ADC conversion on
 * ADC0 and steps the LED pattern on PB5, so sampling and modulation share a
 * single clock: the modulation frequency is exactly RATE_HZ / (2 * HALF_PERIOD).
 * The LED state at the tick travels in bit 15 of that sample's word.
 * Samples are collected in blocks (double-buffered) and sent as frames of the
 * protocol in PROTOCOL.md through an interrupt-driven UART queue; the main
 * loop sleeps (idle mode) whenever it has nothing to do.  The self-description
 * goes out at start and once a second.
 *
 * Why the ADC is started from the timer interrupt and not by the ADC's own
 * auto-trigger (Timer1 compare B): the start is then one fixed interrupt
 * latency after the tick (a constant delay, no jitter), and the simulator we
 * test with (simavr 1.6) does not model ADC auto-trigger sources.
 *
 * Safety: the LED pin drives at most a few milliamperes through a
 * current-limiting resistor; see PROTOCOL.md, "Wiring and safety".
 */
#include <avr/interrupt.h>
#include <avr/io.h>
#include <avr/pgmspace.h>
#include <avr/sleep.h>
#include <stdint.h>
#include <util/crc16.h>

#ifndef F_CPU
#define F_CPU 16000000UL
#endif

#define RATE_HZ 8000UL    /* samples per second */
#define BLOCK 16          /* samples per sample frame (500 frames/s) */
#define HALF_PERIOD 8     /* samples per LED half period: 500 Hz */
#define BAUD 500000UL     /* exact at 16 MHz with U2X (UBRR = 3) */
#define ADC_BITS 10
#define VREF_MV 5000      /* AVcc as reference; measure yours for better volts */
#define LED_BIT 15        /* bit of the sample word carrying the LED state */

#define SYNC0 0xE7
#define SYNC1 0x1A
#define MAJOR 1
#define KIND_SAMPLES ((MAJOR << 4) | 0x1)
#define KIND_DESCRIPTION ((MAJOR << 4) | 0x2)
#define DESCRIBE_EVERY (RATE_HZ / BLOCK) /* frames between descriptions: 1 s */

#define TX_SIZE 128 /* power of two */

static const char NAME[] PROGMEM = "livefilt reference ATmega328P";

static volatile uint16_t blocks[2][BLOCK];
static volatile uint8_t fill_index; /* next slot in the block being filled */
static volatile uint8_t fill_block; /* which of the two blocks is being filled */
static volatile uint8_t ready_block = 0xFF; /* a full block waiting to go, or 0xFF */
static volatile uint8_t led_at_tick; /* LED state when the running conversion began */

static volatile uint8_t tx_buf[TX_SIZE];
static volatile uint8_t tx_head, tx_tail; /* head: main writes; tail: UDRE ISR reads */

ISR(TIMER1_COMPA_vect)
{
    static uint8_t phase;
    ADCSRA |= _BV(ADSC);
    led_at_tick = (PORTB >> PORTB5) & 1;
    if (++phase == HALF_PERIOD) {
        phase = 0;
        PINB = _BV(PINB5); /* writing 1 to PINx toggles the pin */
    }
}

ISR(ADC_vect)
{
    uint16_t word = ADC | ((uint16_t)led_at_tick << LED_BIT);
    blocks[fill_block][fill_index] = word;
    if (++fill_index == BLOCK) {
        fill_index = 0;
        ready_block = fill_block;
        fill_block ^= 1;
    }
}

ISR(USART_UDRE_vect)
{
    if (tx_tail == tx_head) {
        UCSR0B &= ~_BV(UDRIE0);
        return;
    }
    UDR0 = tx_buf[tx_tail];
    tx_tail = (tx_tail + 1) & (TX_SIZE - 1);
}

/* Sleep until the next interrupt, without missing one that arrives in between. */
static void nap(void)
{
    cli();
    sleep_enable();
    sei();
    sleep_cpu();
    sleep_disable();
}

static void tx_byte(uint8_t b)
{
    uint8_t next = (tx_head + 1) & (TX_SIZE - 1);
    while (next == tx_tail)
        nap(); /* queue full: the UDRE interrupt will make room */
    tx_buf[tx_head] = b;
    tx_head = next;
    UCSR0B |= _BV(UDRIE0);
}

static uint16_t crc;

static void tx_crc(uint8_t b)
{
    crc = _crc_xmodem_update(crc, b); /* poly 0x1021, MSB first: CRC-16/CCITT-FALSE with init 0xFFFF */
    tx_byte(b);
}

static void frame_start(uint8_t kind, uint8_t length, uint16_t seq)
{
    tx_byte(SYNC0);
    tx_byte(SYNC1);
    crc = 0xFFFF;
    tx_crc(kind);
    tx_crc(length);
    tx_crc(seq & 0xFF);
    tx_crc(seq >> 8);
}

static void frame_end(void)
{
    uint16_t c = crc;
    tx_byte(c >> 8);
    tx_byte(c & 0xFF);
}

static void tx_u16(uint16_t v)
{
    tx_crc(v & 0xFF);
    tx_crc(v >> 8);
}

static void tx_u32(uint32_t v)
{
    tx_u16(v & 0xFFFF);
    tx_u16(v >> 16);
}

static void send_description(uint16_t next_seq)
{
    uint8_t name_len = sizeof NAME - 1;
    frame_start(KIND_DESCRIPTION, 19 + name_len, next_seq);
    tx_crc(1);                 /* description layout version */
    tx_crc(1);                 /* channels */
    tx_crc(BLOCK);
    tx_crc(ADC_BITS);
    tx_u32(RATE_HZ * 1000UL);  /* millihertz */
    tx_u32(RATE_HZ * 1000UL / (2 * HALF_PERIOD));
    tx_u16(VREF_MV);
    tx_crc(0);                 /* channel whose word carries the LED bit */
    tx_crc(LED_BIT);
    tx_crc('B');               /* LED on PB5 (Arduino Uno: D13) */
    tx_crc(5);
    tx_crc(name_len);
    for (uint8_t i = 0; i < name_len; i++)
        tx_crc(pgm_read_byte(&NAME[i]));
    frame_end();
}

static void send_block(uint8_t which, uint16_t seq)
{
    frame_start(KIND_SAMPLES, 2 * BLOCK, seq);
    for (uint8_t i = 0; i < BLOCK; i++)
        tx_u16(blocks[which][i]);
    frame_end();
}

int main(void)
{
    DDRB |= _BV(DDB5);
    PORTB |= _BV(PORTB5); /* LED on during the first half period */

    UBRR0 = (F_CPU / (8 * BAUD)) - 1;
    UCSR0A = _BV(U2X0);
    UCSR0B = _BV(TXEN0);
    UCSR0C = _BV(UCSZ01) | _BV(UCSZ00); /* 8 data bits, no parity, 1 stop bit */

    ADMUX = _BV(REFS0); /* AVcc reference, ADC0 */
    DIDR0 = _BV(ADC0D);
    /* prescaler 128: 125 kHz ADC clock, 104 us per conversion (< 125 us tick) */
    ADCSRA = _BV(ADEN) | _BV(ADSC) | _BV(ADPS2) | _BV(ADPS1) | _BV(ADPS0);
    /* the first conversion after enabling takes 25 ADC clocks (200 us), longer
     * than a tick: do it now, so that every sample of the stream is on time */
    while (ADCSRA & _BV(ADSC))
        ;
    ADCSRA |= _BV(ADIF) | _BV(ADIE); /* writing 1 clears the flag */

    /* Timer1, CTC on OCR1A, prescaler 8: 2 MHz / 250 = 8 kHz */
    OCR1A = (F_CPU / 8 / RATE_HZ) - 1;
    TCCR1B = _BV(WGM12) | _BV(CS11);
    TIMSK1 = _BV(OCIE1A);

    set_sleep_mode(SLEEP_MODE_IDLE);
    sei();

    uint16_t seq = 0;
    uint16_t until_description = 0;
    for (;;) {
        uint8_t which;
        cli();
        which = ready_block;
        ready_block = 0xFF;
        sei();
        if (which == 0xFF) {
            nap();
            continue;
        }
        if (until_description == 0) {
            send_description(seq);
            until_description = DESCRIBE_EVERY;
        }
        until_description--;
        send_block(which, seq);
        seq++;
    }
}
