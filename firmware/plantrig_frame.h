/*
 * plantrig binary frames for controller firmware: encoder, decoder, streaming deframer.
 *
 * Portable C99. No malloc, no stdio; only <stdint.h>, <stddef.h> (freestanding) and
 * <string.h> (memcpy, memset). Every buffer is the caller's. Floats must be IEEE 754
 * binary32 (checked at compile time for size). Byte order on the wire is little-endian
 * whatever the CPU's. The layout is specified in docs/protocol.md; the Python codec in
 * plantrig.io is the reference and the tests check this code byte for byte against it.
 */
#ifndef PLANTRIG_FRAME_H
#define PLANTRIG_FRAME_H

#include <stddef.h>
#include <stdint.h>

#define PR_VERSION 1u
#define PR_MAX_CHANNELS 32u
#define PR_HEADER_SIZE 10u
#define PR_CRC_SIZE 2u
#define PR_MAX_RAW (PR_HEADER_SIZE + 4u * PR_MAX_CHANNELS + PR_CRC_SIZE) /* 140 */
#define PR_MAX_ENCODED (PR_MAX_RAW + (PR_MAX_RAW + 253u) / 254u)          /* 141 */
#define PR_MAX_WIRE (PR_MAX_ENCODED + 1u) /* with the 0x00 delimiter: 142 */
#define PR_STATUS_MIN_CHANNELS 2u

enum pr_kind {
    PR_KIND_SENSOR = 1,    /* rig -> controller */
    PR_KIND_COMMAND = 2,   /* controller -> rig */
    PR_KIND_HEARTBEAT = 3, /* no values */
    PR_KIND_STATUS = 4     /* float32 [state, detail, rx_ok, rx_bad, ...] */
};

enum pr_encoding {
    PR_ENC_F32 = 0, /* IEEE 754 binary32 */
    PR_ENC_I16 = 1  /* int16 counts; value = raw * scale (scale from the rig file) */
};

/* Results; the names match FrameError.reason in the Python codec. */
enum pr_result {
    PR_OK = 0,
    PR_ERR_COBS,
    PR_ERR_CRC,
    PR_ERR_TRUNCATED,
    PR_ERR_LENGTH,
    PR_ERR_OVERSIZE,
    PR_ERR_VERSION,
    PR_ERR_KIND,
    PR_ERR_ENCODING,
    PR_ERR_CHANNELS,
    PR_ERR_NON_FINITE,
    PR_ERR_BUFFER,           /* the caller's output buffer is too small */
    PR_ERR_ENCODING_MISMATCH /* values in the other encoding than the link's */
};

typedef struct {
    uint8_t version; /* filled by pr_decode; pr_encode always writes PR_VERSION */
    uint8_t kind;     /* enum pr_kind */
    uint8_t encoding; /* enum pr_encoding */
    uint8_t count;    /* channels, 0..PR_MAX_CHANNELS */
    uint16_t seq;     /* +1 per frame sent, wraps */
    uint32_t tick;    /* see docs/protocol.md for what each side puts here */
    union {
        float f32[PR_MAX_CHANNELS];
        int16_t i16[PR_MAX_CHANNELS];
    } v;
} pr_frame;

/* CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, xorout 0. Pass
 * PR_CRC_INIT as crc to start, or a previous result to continue. */
#define PR_CRC_INIT 0xFFFFu
uint16_t pr_crc16(uint16_t crc, const uint8_t *data, size_t len);

/* COBS encode len bytes of src into dst (no delimiter added). Returns the encoded length,
 * or 0 if dst_cap is too small. dst must not overlap src. */
size_t pr_cobs_encode(const uint8_t *src, size_t len, uint8_t *dst, size_t dst_cap);

/* COBS decode (src without delimiter). Returns PR_OK, PR_ERR_COBS or PR_ERR_BUFFER. */
int pr_cobs_decode(const uint8_t *src, size_t len, uint8_t *dst, size_t dst_cap,
                   size_t *out_len);

/* Encode f into out as COBS bytes followed by 0x00, ready to write to the UART.
 * out_cap >= PR_MAX_WIRE always suffices. Returns PR_OK (and *out_len), PR_ERR_KIND,
 * PR_ERR_ENCODING, PR_ERR_CHANNELS, PR_ERR_NON_FINITE or PR_ERR_BUFFER. */
int pr_encode(const pr_frame *f, uint8_t *out, size_t out_cap, size_t *out_len);

/* Decode one frame: the bytes between two delimiters (a trailing 0x00 is allowed).
 * On PR_OK *f holds it; on any error *f is unspecified and must not be used. */
int pr_decode(const uint8_t *enc, size_t len, pr_frame *f);

/* pr_decode for a link set up with link_encoding (PR_ENC_F32 or PR_ENC_I16, from the rig
 * file): a SENSOR or COMMAND frame in the other encoding is refused with
 * PR_ERR_ENCODING_MISMATCH, so counts are never read as floats nor floats as counts.
 * Use this one in firmware; pr_decode is for tools that accept either encoding. */
int pr_decode_link(const uint8_t *enc, size_t len, uint8_t link_encoding, pr_frame *f);

/* Streaming deframer: push received bytes one at a time (from the main loop, not the
 * ISR). A run longer than PR_MAX_ENCODED is dropped whole and counted in oversize. */
typedef struct {
    uint8_t buf[PR_MAX_ENCODED];
    size_t len;
    uint8_t skipping;
    uint8_t ready;
    uint32_t oversize;
} pr_deframer;

void pr_deframer_init(pr_deframer *d);

/* Returns 1 when byte completes a frame: *frame and *len then point at its bytes inside d,
 * valid until the next push (hand them to pr_decode). Returns 0 otherwise. */
int pr_deframer_push(pr_deframer *d, uint8_t byte, const uint8_t **frame, size_t *len);

/* Short lowercase name of a result ("crc", "cobs", ...), as in the Python codec. */
const char *pr_result_name(int result);

#endif /* PLANTRIG_FRAME_H */
