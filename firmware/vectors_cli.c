/*
 * Host-side driver of plantrig_frame.c for the cross-check tests (not for targets).
 * Reads one command per line on stdin, writes one answer line per command on stdout:
 *
 *   C <hex>                      -> OK <crc16 as 4 hex digits>
 *   B <hex>                      -> OK <COBS encoding as hex>
 *   U <hex>                      -> OK <COBS decoding as hex> | ERR <reason>
 *   E <kind> <seq> <tick> <enc> <count> <v>...
 *                                -> OK <wire hex, delimiter included> | ERR <reason>
 *   D <hex>                      -> OK <version> <kind> <seq> <tick> <enc> <count> <v>...
 *                                   | ERR <reason>
 *   L <link enc> <hex>           -> as D, decoded with pr_decode_link for a link set up
 *                                   with <link enc> (0 float32, 1 int16)
 *   S [<hex>]                    -> S [<frame hex>]... #<oversize runs so far>
 *                                   (one deframer kept across S lines)
 *
 * Values <v> are float32 bit patterns as 8 hex digits for enc 0, decimal int16 for enc 1.
 * Numbers other than values are decimal. Hex is lowercase, without separators.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "plantrig_frame.h"

#define LINE_MAX_CHARS (1u << 18)
#define BYTES_MAX (LINE_MAX_CHARS / 2u)

static char line[LINE_MAX_CHARS];
static uint8_t bytes[BYTES_MAX];
static uint8_t out[BYTES_MAX + BYTES_MAX / 254u + 2u];

static int hex_digit(char c)
{
    if (c >= '0' && c <= '9') {
        return c - '0';
    }
    if (c >= 'a' && c <= 'f') {
        return c - 'a' + 10;
    }
    if (c >= 'A' && c <= 'F') {
        return c - 'A' + 10;
    }
    return -1;
}

/* parse hex from s (stops at whitespace or end); returns byte count or -1 */
static long parse_hex(const char *s, uint8_t *dst, size_t cap)
{
    size_t n = 0;
    while (*s == ' ') {
        ++s;
    }
    while (*s && *s != '\n' && *s != ' ') {
        int hi = hex_digit(s[0]);
        int lo = s[1] ? hex_digit(s[1]) : -1;
        if (hi < 0 || lo < 0 || n >= cap) {
            return -1;
        }
        dst[n++] = (uint8_t)(hi * 16 + lo);
        s += 2;
    }
    return (long)n;
}

static void print_hex(const uint8_t *p, size_t n)
{
    size_t i;
    for (i = 0; i < n; ++i) {
        printf("%02x", p[i]);
    }
}

static void cmd_encode(char *args)
{
    pr_frame f;
    char *end;
    size_t len;
    unsigned i;
    int r;

    memset(&f, 0, sizeof f);
    f.kind = (uint8_t)strtoul(args, &end, 10);
    f.seq = (uint16_t)strtoul(end, &end, 10);
    f.tick = (uint32_t)strtoul(end, &end, 10);
    f.encoding = (uint8_t)strtoul(end, &end, 10);
    f.count = (uint8_t)strtoul(end, &end, 10);
    for (i = 0; i < f.count && i < PR_MAX_CHANNELS; ++i) {
        if (f.encoding == PR_ENC_F32) {
            uint32_t bits = (uint32_t)strtoul(end, &end, 16);
            memcpy(&f.v.f32[i], &bits, sizeof bits);
        } else {
            f.v.i16[i] = (int16_t)strtol(end, &end, 10);
        }
    }
    r = pr_encode(&f, out, sizeof out, &len);
    if (r != PR_OK) {
        printf("ERR %s\n", pr_result_name(r));
        return;
    }
    printf("OK ");
    print_hex(out, len);
    printf("\n");
}

/* link_encoding -1: pr_decode (either encoding), else pr_decode_link */
static void cmd_decode(long n, int link_encoding)
{
    pr_frame f;
    unsigned i;
    int r = link_encoding < 0 ? pr_decode(bytes, (size_t)n, &f)
                              : pr_decode_link(bytes, (size_t)n, (uint8_t)link_encoding, &f);
    if (r != PR_OK) {
        printf("ERR %s\n", pr_result_name(r));
        return;
    }
    printf("OK %u %u %u %lu %u %u", f.version, f.kind, f.seq, (unsigned long)f.tick,
           f.encoding, f.count);
    for (i = 0; i < f.count; ++i) {
        if (f.encoding == PR_ENC_F32) {
            uint32_t bits;
            memcpy(&bits, &f.v.f32[i], sizeof bits);
            printf(" %08lx", (unsigned long)bits);
        } else {
            printf(" %d", f.v.i16[i]);
        }
    }
    printf("\n");
}

static void cmd_split(pr_deframer *d, long n)
{
    long i;
    printf("S");
    for (i = 0; i < n; ++i) {
        const uint8_t *frame;
        size_t len;
        if (pr_deframer_push(d, bytes[i], &frame, &len)) {
            printf(" ");
            print_hex(frame, len);
        }
    }
    /* the count is printed after the pushes so it includes this chunk */
    printf(" #%lu\n", (unsigned long)d->oversize);
}

int main(void)
{
    static pr_deframer deframer;
    pr_deframer_init(&deframer);

    while (fgets(line, sizeof line, stdin)) {
        char cmd = line[0];
        char *args = line + 1;
        int link_encoding = -1;
        long n = 0;
        size_t len = 0;
        if (cmd == 'E') {
            cmd_encode(line + 1);
            continue;
        }
        if (cmd == 'L') {
            link_encoding = (int)strtol(args, &args, 10);
        }
        if (cmd == 'C' || cmd == 'B' || cmd == 'U' || cmd == 'D' || cmd == 'S' || cmd == 'L') {
            n = parse_hex(args, bytes, sizeof bytes);
            if (n < 0) {
                printf("BAD hex\n");
                continue;
            }
        }
        switch (cmd) {
        case 'C':
            printf("OK %04x\n", pr_crc16(PR_CRC_INIT, bytes, (size_t)n));
            break;
        case 'B':
            len = pr_cobs_encode(bytes, (size_t)n, out, sizeof out);
            printf("OK ");
            print_hex(out, len);
            printf("\n");
            break;
        case 'U':
            if (pr_cobs_decode(bytes, (size_t)n, out, sizeof out, &len) != PR_OK) {
                printf("ERR cobs\n");
            } else {
                printf("OK ");
                print_hex(out, len);
                printf("\n");
            }
            break;
        case 'D':
        case 'L':
            cmd_decode(n, link_encoding);
            break;
        case 'S':
            cmd_split(&deframer, n);
            break;
        default:
            printf("BAD command\n");
        }
    }
    return 0;
}
