/*
 * Unit tests of the C reference, and the cross-check against the shared vectors
 * (firmware_protocol/vectors/frames.txt, written by the Python codec).
 * Usage: test_wire PATH/TO/frames.txt
 * The test harness uses stdio and stdlib; the library itself does not.
 */
#define _POSIX_C_SOURCE 200809L
#include "../spinrig_wire.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int failures = 0;
static int checks = 0;

#define CHECK(cond, ...)                                                                           \
    do {                                                                                           \
        checks++;                                                                                  \
        if (!(cond)) {                                                                             \
            failures++;                                                                            \
            printf("FAIL %s:%d: ", __FILE__, __LINE__);                                            \
            printf(__VA_ARGS__);                                                                   \
            printf("\n");                                                                          \
        }                                                                                          \
    } while (0)

/* ---------------------------------------------------------------- published values */

static void test_crc_check_value(void)
{
    /* RevEng CRC catalogue, CRC-16/IBM-3740: check = 0x29B1; with init 0 (XMODEM) 0x31C3. */
    const uint8_t s[] = "123456789";
    CHECK(sr_crc16(s, 9, 0xFFFFu) == 0x29B1u, "crc16(123456789) = %04x", sr_crc16(s, 9, 0xFFFFu));
    CHECK(sr_crc16(s, 9, 0x0000u) == 0x31C3u, "xmodem check = %04x", sr_crc16(s, 9, 0));
}

static void cobs_pair(const uint8_t *in, size_t n, const uint8_t *want, size_t wn, const char *name)
{
    uint8_t enc[600], dec[600];
    size_t e = sr_cobs_encode(in, n, enc);
    int d;
    CHECK(e == wn && memcmp(enc, want, wn) == 0, "COBS encode %s", name);
    d = sr_cobs_decode(want, wn, dec, sizeof dec);
    CHECK(d == (int)n && memcmp(dec, in, n) == 0, "COBS decode %s", name);
}

static void test_cobs_published_pairs(void)
{
    /* Cheshire and Baker, IEEE/ACM Trans. Networking 7(2), 1999: worked pairs. */
    static const uint8_t a[] = {0x00}, aw[] = {0x01, 0x01};
    static const uint8_t b[] = {0x00, 0x00}, bw[] = {0x01, 0x01, 0x01};
    static const uint8_t c[] = {0x00, 0x11, 0x00}, cw[] = {0x01, 0x02, 0x11, 0x01};
    static const uint8_t d[] = {0x11, 0x22, 0x00, 0x33}, dw[] = {0x03, 0x11, 0x22, 0x02, 0x33};
    static const uint8_t e[] = {0x11, 0x22, 0x33, 0x44}, ew[] = {0x05, 0x11, 0x22, 0x33, 0x44};
    static const uint8_t f[] = {0x11, 0x00, 0x00, 0x00}, fw[] = {0x02, 0x11, 0x01, 0x01, 0x01};
    static const uint8_t gw[] = {0x01};
    uint8_t h[254], hw[255], hw_trailing[256], dec[300];
    size_t i;
    cobs_pair(a, 1, aw, 2, "00");
    cobs_pair(b, 2, bw, 3, "00 00");
    cobs_pair(c, 3, cw, 4, "00 11 00");
    cobs_pair(d, 4, dw, 5, "11 22 00 33");
    cobs_pair(e, 4, ew, 5, "11 22 33 44");
    cobs_pair(f, 4, fw, 5, "11 00 00 00");
    cobs_pair(a, 0, gw, 1, "empty");
    for (i = 0; i < 254; i++) {
        h[i] = (uint8_t)(i + 1);
        hw[i + 1] = (uint8_t)(i + 1);
        hw_trailing[i + 1] = (uint8_t)(i + 1);
    }
    hw[0] = 0xFF;
    hw_trailing[0] = 0xFF;
    hw_trailing[255] = 0x01;
    cobs_pair(h, 254, hw, 255, "01..FE (canonical, no trailing 01)");
    /* The other encoders' form, with a trailing 01, must decode to the same bytes. */
    CHECK(sr_cobs_decode(hw_trailing, 256, dec, sizeof dec) == 254 && memcmp(dec, h, 254) == 0,
          "COBS decode accepts trailing 01");
    CHECK(sr_cobs_decode((const uint8_t *)"\x05\x11", 2, dec, sizeof dec) == -1, "COBS truncated");
    CHECK(sr_cobs_decode((const uint8_t *)"\x03\x11\x00", 3, dec, sizeof dec) == -1, "COBS zero");
}

/* ---------------------------------------------------------------- bench safety */

static sr_command_t cmd_of(uint8_t type)
{
    sr_command_t c;
    memset(&c, 0, sizeof c);
    c.type = type;
    return c;
}

static void test_bench_safety(void)
{
    sr_bench_t b;
    sr_command_t arm = cmd_of(SR_ARM_BENCH), thr = cmd_of(SR_SET_THROTTLE);
    sr_command_t hb = cmd_of(SR_HOST_HEARTBEAT), stop = cmd_of(SR_STOP_MOTORS);
    sr_verdict_t v;
    int i;
    sr_bench_init(&b, 500, 8000, 4);
    CHECK(sr_bench_state(&b) == SR_BENCH_DISARMED && (b.faults & SR_FAULT_REBOOTED), "starts disarmed");

    thr.u.throttle.nonce = 77;
    thr.u.throttle.count = 4;
    for (i = 0; i < 4; i++) {
        thr.u.throttle.throttle[i] = 2000;
    }
    v = sr_bench_command(&b, &thr, 0);
    CHECK(v.result == SR_OUTCOME_NOT_ARMED && b.throttle[0] == 0, "throttle refused before arming");

    arm.u.nonce = 77;
    v = sr_bench_command(&b, &arm, 10);
    CHECK(v.result == SR_OUTCOME_OK && v.detail == 77 && b.faults == 0, "arm");
    thr.u.throttle.nonce = 78;
    v = sr_bench_command(&b, &thr, 20);
    CHECK(v.result == SR_OUTCOME_BAD_NONCE && b.throttle[0] == 0, "wrong nonce refused");
    thr.u.throttle.nonce = 77;
    thr.u.throttle.count = 3;
    v = sr_bench_command(&b, &thr, 20);
    CHECK(v.result == SR_OUTCOME_BAD_MOTOR_COUNT, "motor count must match");
    thr.u.throttle.count = 4;
    thr.u.throttle.throttle[2] = 9500;
    v = sr_bench_command(&b, &thr, 30);
    CHECK(v.result == SR_OUTCOME_LIMITED && v.detail == 8000 && b.throttle[2] == 8000 && b.throttle[0] == 2000,
          "throttle clamped to the limit");
    CHECK(sr_bench_state(&b) == SR_BENCH_SPINNING, "spinning");

    /* Heartbeat keeps it alive; silence for the timeout stops it. */
    hb.u.nonce = 77;
    CHECK(sr_bench_command(&b, &hb, 400).result == SR_OUTCOME_OK, "heartbeat ok");
    CHECK(sr_bench_tick(&b, 899) == 0 && b.armed, "alive before timeout");
    CHECK(sr_bench_tick(&b, 900) == 1, "stops at timeout");
    CHECK(!b.armed && b.throttle[2] == 0 && (b.faults & SR_FAULT_HEARTBEAT_LOST), "disarmed, zero");
    CHECK(sr_bench_tick(&b, 2000) == 0, "no repeat stop when disarmed");

    /* Timestamps that wrap past 2^32 ms. */
    sr_bench_command(&b, &arm, 0xFFFFFF00u);
    CHECK(sr_bench_tick(&b, 0x00000010u) == 0, "wrap: 272 ms is within 500");
    CHECK(sr_bench_tick(&b, 0x00000100u) == 1, "wrap: 512 ms is past 500");

    /* Stop command. */
    sr_bench_command(&b, &arm, 5000);
    sr_bench_command(&b, &thr, 5001);
    sr_bench_command(&b, &stop, 5002);
    CHECK(!b.armed && b.throttle[0] == 0 && (b.faults & SR_FAULT_STOP_COMMAND), "stop disarms");

    /* Error burst: 8 bad frames within 1 s while armed. */
    sr_bench_command(&b, &arm, 6000);
    sr_bench_command(&b, &thr, 6001);
    for (i = 0; i < 7; i++) {
        CHECK(sr_bench_bad_frame(&b, 6100u + 100u * (uint32_t)i) == 0, "bad frame %d tolerated", i);
    }
    CHECK(sr_bench_bad_frame(&b, 6799) == 1 && !b.armed && (b.faults & SR_FAULT_PROTOCOL_ERRORS),
          "burst stops");
    /* Spread-out bad frames do not. */
    sr_bench_command(&b, &arm, 10000);
    for (i = 0; i < 20; i++) {
        sr_bench_command(&b, &hb, 10000u + 200u * (uint32_t)i);
        CHECK(sr_bench_bad_frame(&b, 10000u + 200u * (uint32_t)i) == 0, "sparse bad frame %d", i);
    }
    CHECK(b.armed, "still armed after sparse errors");

    /* A blocking fault refuses arming. */
    sr_bench_stop(&b, SR_FAULT_SUPPLY_LOW);
    v = sr_bench_command(&b, &arm, 20000);
    CHECK(v.result == SR_OUTCOME_REFUSED_FAULT && !b.armed, "fault blocks arming");

    /* Motors reported but not driven (throttle_ceiling 0): arming is UNSUPPORTED (SPEC 7.6). */
    sr_bench_init(&b, 500, 0, 4);
    arm.u.nonce = 5;
    v = sr_bench_command(&b, &arm, 0);
    CHECK(v.result == SR_OUTCOME_UNSUPPORTED && !b.armed, "no driven motors: arming unsupported");
}

static void test_decoder_resync(void)
{
    /* Garbage, an oversize run, then a valid frame: the valid frame still decodes. */
    sr_decoder_t d;
    sr_command_t c;
    uint8_t frame[SR_MAX_WIRE];
    uint8_t payload[4] = {0x0D, 0xF0, 0xFE, 0xCA};
    size_t n = sr_frame_encode(SR_HOST_HEARTBEAT, 9, payload, 4, frame, sizeof frame);
    size_t i;
    int got = 0;
    sr_decoder_init(&d);
    for (i = 0; i < 300; i++) {
        sr_decoder_push(&d, (uint8_t)(1 + i % 200), &c);
    }
    sr_decoder_push(&d, 0, &c);
    sr_decoder_push(&d, 0x55, &c);
    sr_decoder_push(&d, 0, &c);
    for (i = 0; i < n; i++) {
        if (sr_decoder_push(&d, frame[i], &c) == SR_RX_COMMAND) {
            got = 1;
        }
    }
    CHECK(got && c.type == SR_HOST_HEARTBEAT && c.u.nonce == 0xCAFEF00Du && c.seq == 9, "resync");
    CHECK(d.oversize == 1 && d.malformed == 1 && d.frames_ok == 1, "counters %u %u %u",
          (unsigned)d.oversize, (unsigned)d.malformed, (unsigned)d.frames_ok);
}

/* ---------------------------------------------------------------- shared vectors */

#define MAX_FIELDS 24
#define MAX_VALUES 128

typedef struct {
    char key[32];
    long long v[MAX_VALUES];
    int n;
    char text[256];
} field_t;

typedef struct {
    char name[64];
    char type[32];
    char verdict[32];
    char layer[16];
    int is_reject;
    int seq;
    field_t f[MAX_FIELDS];
    int nf;
    uint8_t frame[600];
    size_t frame_len;
} vector_t;

static void copy_text(char *dst, size_t cap, const char *src)
{
    size_t n = strlen(src);
    if (n >= cap) {
        n = cap - 1;
    }
    memcpy(dst, src, n);
    dst[n] = 0;
}

static const field_t *fld(const vector_t *v, const char *key)
{
    int i;
    for (i = 0; i < v->nf; i++) {
        if (strcmp(v->f[i].key, key) == 0) {
            return &v->f[i];
        }
    }
    printf("FAIL vector %s: no field %s\n", v->name, key);
    failures++;
    exit(1);
}

static long long val(const vector_t *v, const char *key)
{
    return fld(v, key)->v[0];
}

static void parse_hex(const char *s, uint8_t *out, size_t *n)
{
    *n = 0;
    while (s[0] && s[1] && s[0] != '\n') {
        unsigned x;
        sscanf(s, "%2x", &x);
        out[(*n)++] = (uint8_t)x;
        s += 2;
    }
}

static void check_device_vector(const vector_t *v)
{
    uint8_t out[SR_MAX_WIRE];
    size_t n = 0;
    uint8_t seq = (uint8_t)v->seq;
    if (strcmp(v->type, "DEVICE_INFO") == 0) {
        sr_device_info_t m;
        const field_t *b = fld(v, "board_id");
        memset(&m, 0, sizeof m);
        m.axis_convention = (uint8_t)val(v, "axis_convention");
        m.boot_id = (uint32_t)val(v, "boot_id");
        m.gyro_rate_mhz = (uint32_t)val(v, "gyro_rate_mhz");
        m.sens_num = (uint32_t)val(v, "sens_num");
        m.sens_den = (uint32_t)val(v, "sens_den");
        m.full_scale_dps = (uint16_t)val(v, "full_scale_dps");
        m.filter_flags = (uint8_t)val(v, "filter_flags");
        m.onboard_cutoff_hz = (uint16_t)val(v, "onboard_cutoff_hz");
        m.onboard_notch_centre_hz = (uint16_t)val(v, "onboard_notch_centre_hz");
        m.antialias_hz = (uint16_t)val(v, "antialias_hz");
        m.motor_count = (uint8_t)val(v, "motor_count");
        m.pole_pairs = (uint8_t)val(v, "pole_pairs");
        m.heartbeat_timeout_ms = (uint16_t)val(v, "heartbeat_timeout_ms");
        m.max_batch = (uint8_t)val(v, "max_batch");
        m.throttle_ceiling = (uint16_t)val(v, "throttle_ceiling");
        m.motor_state_rate_hz = (uint16_t)val(v, "motor_state_rate_hz");
        m.board_id_len = (uint8_t)strlen(b->text);
        memcpy(m.board_id, b->text, m.board_id_len);
        n = sr_encode_device_info(&m, seq, out, sizeof out);
    } else if (strcmp(v->type, "GYRO_BLOCK") == 0) {
        const field_t *s = fld(v, "samples");
        int16_t xyz[3 * SR_MAX_GYRO_BATCH];
        int i;
        for (i = 0; i < s->n; i++) {
            xyz[i] = (int16_t)s->v[i];
        }
        n = sr_encode_gyro_block((uint32_t)val(v, "sample_seq"), (uint32_t)val(v, "t_us"), xyz,
                                 (uint8_t)(s->n / 3), seq, out, sizeof out);
    } else if (strcmp(v->type, "MOTOR_STATE") == 0) {
        sr_motor_state_t m;
        const field_t *s = fld(v, "motors");
        int i;
        m.t_us = (uint32_t)val(v, "t_us");
        m.count = (uint8_t)(s->n / 3);
        for (i = 0; i < m.count; i++) {
            m.motors[i].erpm = (uint32_t)s->v[3 * i];
            m.motors[i].throttle = (uint16_t)s->v[3 * i + 1];
            m.motors[i].flags = (uint8_t)s->v[3 * i + 2];
        }
        n = sr_encode_motor_state(&m, seq, out, sizeof out);
    } else if (strcmp(v->type, "DEVICE_STATUS") == 0) {
        sr_device_status_t m;
        m.t_us = (uint32_t)val(v, "t_us");
        m.boot_id = (uint32_t)val(v, "boot_id");
        m.bench_state = (uint8_t)val(v, "bench_state");
        m.faults = (uint16_t)val(v, "faults");
        m.supply_mv = (uint16_t)val(v, "supply_mv");
        m.current_10ma = (uint16_t)val(v, "current_10ma");
        m.host_frames_ok = (uint16_t)val(v, "host_frames_ok");
        m.host_frames_bad = (uint16_t)val(v, "host_frames_bad");
        m.streaming = (uint8_t)val(v, "streaming");
        n = sr_encode_device_status(&m, seq, out, sizeof out);
    } else if (strcmp(v->type, "LOG_TEXT") == 0) {
        const field_t *t = fld(v, "text");
        n = sr_encode_log_text((uint8_t)val(v, "level"), t->text, strlen(t->text), seq, out, sizeof out);
    } else if (strcmp(v->type, "COMMAND_OUTCOME") == 0) {
        n = sr_encode_command_outcome((uint8_t)val(v, "command_type"), (uint8_t)val(v, "command_seq"),
                                  (uint8_t)val(v, "result"), (uint32_t)val(v, "detail"), seq, out,
                                  sizeof out);
    } else {
        printf("FAIL vector %s: unhandled device type %s\n", v->name, v->type);
        failures++;
        return;
    }
    CHECK(n == v->frame_len && memcmp(out, v->frame, n) == 0, "C encoder differs from vector %s",
          v->name);
}

static sr_rx_t push_all(const uint8_t *bytes, size_t n, sr_command_t *c)
{
    sr_decoder_t d;
    sr_rx_t last = SR_RX_NONE;
    size_t i;
    sr_decoder_init(&d);
    for (i = 0; i < n; i++) {
        sr_rx_t r = sr_decoder_push(&d, bytes[i], c);
        if (r != SR_RX_NONE) {
            last = r;
        }
    }
    return last;
}

static void check_host_vector(const vector_t *v)
{
    sr_command_t c;
    sr_rx_t r = push_all(v->frame, v->frame_len, &c);
    CHECK(r == SR_RX_COMMAND, "C decoder rejects vector %s (%d)", v->name, (int)r);
    if (r != SR_RX_COMMAND) {
        return;
    }
    CHECK(c.seq == v->seq, "seq of %s", v->name);
    if (strcmp(v->type, "STREAM_CONTROL") == 0) {
        CHECK(c.type == SR_STREAM_CONTROL && c.u.enable == val(v, "enable"), "%s", v->name);
    } else if (strcmp(v->type, "ARM_BENCH") == 0) {
        CHECK(c.type == SR_ARM_BENCH && c.u.nonce == (uint32_t)val(v, "nonce"), "%s", v->name);
    } else if (strcmp(v->type, "HOST_HEARTBEAT") == 0) {
        CHECK(c.type == SR_HOST_HEARTBEAT && c.u.nonce == (uint32_t)val(v, "nonce"), "%s", v->name);
    } else if (strcmp(v->type, "STOP_MOTORS") == 0) {
        CHECK(c.type == SR_STOP_MOTORS && c.u.reason == val(v, "reason"), "%s", v->name);
    } else if (strcmp(v->type, "REQUEST_INFO") == 0) {
        CHECK(c.type == SR_REQUEST_INFO, "%s", v->name);
    } else if (strcmp(v->type, "SIM_TAP") == 0) {
        CHECK(c.type == SR_SIM_TAP && c.u.tap.target == val(v, "target") &&
                  c.u.tap.strength == val(v, "strength"), "%s", v->name);
    } else if (strcmp(v->type, "SET_THROTTLE") == 0) {
        const field_t *t = fld(v, "throttles");
        int i, same = c.type == SR_SET_THROTTLE && c.u.throttle.nonce == (uint32_t)val(v, "nonce") &&
                      c.u.throttle.count == t->n;
        for (i = 0; same && i < t->n; i++) {
            same = c.u.throttle.throttle[i] == t->v[i];
        }
        CHECK(same, "%s", v->name);
    } else {
        printf("FAIL vector %s: unhandled host type %s\n", v->name, v->type);
        failures++;
    }
}

static int is_host_type(const char *t)
{
    return strcmp(t, "REQUEST_INFO") == 0 || strcmp(t, "STREAM_CONTROL") == 0 || strcmp(t, "ARM_BENCH") == 0 ||
           strcmp(t, "SET_THROTTLE") == 0 || strcmp(t, "STOP_MOTORS") == 0 ||
           strcmp(t, "HOST_HEARTBEAT") == 0 || strcmp(t, "SIM_TAP") == 0;
}

static void check_every_frame_decodes_and_single_bit_errors(const vector_t *v)
{
    /* Every valid vector passes the C frame layer (COBS + CRC) and every 1-bit error fails CRC or
     * COBS: CRC-16/CCITT has Hamming distance 4 at these lengths (Koopman's CRC tables). */
    uint8_t enc[600], body[SR_MAX_BODY];
    size_t n = v->frame_len - 1, bit;
    int len = sr_cobs_decode(v->frame, n, body, sizeof body);
    CHECK(len >= 4 && sr_crc16(body, (size_t)len, 0xFFFFu) == 0, "frame layer rejects %s", v->name);
    for (bit = 0; bit < 8u * (size_t)len && len > 0; bit++) {
        size_t m;
        uint8_t copy[SR_MAX_BODY];
        memcpy(copy, body, (size_t)len);
        copy[bit / 8] ^= (uint8_t)(1u << (bit % 8));
        m = sr_cobs_encode(copy, (size_t)len, enc);
        {
            uint8_t back[SR_MAX_BODY];
            int k = sr_cobs_decode(enc, m, back, sizeof back);
            CHECK(k == len && sr_crc16(back, (size_t)k, 0xFFFFu) != 0, "bit %u of %s undetected",
                  (unsigned)bit, v->name);
        }
    }
}

static void check_vector(const vector_t *v)
{
    if (v->is_reject) {
        sr_command_t c;
        sr_rx_t r = push_all(v->frame, v->frame_len, &c);
        sr_rx_t want = strcmp(v->verdict, "crc_error") == 0      ? SR_RX_CRC_ERROR
                       : strcmp(v->verdict, "malformed") == 0    ? SR_RX_MALFORMED
                       : strcmp(v->verdict, "oversize") == 0     ? SR_RX_OVERSIZE
                       : strcmp(v->verdict, "unknown_type") == 0 ? SR_RX_UNKNOWN
                                                                 : SR_RX_NONE;
        /* Payload-layer verdicts of device-to-host types are the host's business: a device
         * decoder sees them as types it does not handle. */
        if (strcmp(v->layer, "payload") == 0 && !is_host_type(v->type)) {
            want = SR_RX_UNKNOWN;
        }
        CHECK(r == want, "reject %s: got %d want %d", v->name, (int)r, (int)want);
        return;
    }
    check_every_frame_decodes_and_single_bit_errors(v);
    if (is_host_type(v->type)) {
        check_host_vector(v);
    } else {
        check_device_vector(v);
    }
}

static int run_vectors(const char *path)
{
    FILE *fp = fopen(path, "r");
    static char line[4096];
    static vector_t v;
    int count = 0;
    if (!fp) {
        printf("FAIL cannot open %s\n", path);
        return -1;
    }
    memset(&v, 0, sizeof v);
    while (fgets(line, sizeof line, fp)) {
        line[strcspn(line, "\n")] = 0;
        if (strncmp(line, "vector ", 7) == 0 || strncmp(line, "reject ", 7) == 0) {
            memset(&v, 0, sizeof v);
            v.is_reject = line[0] == 'r';
            copy_text(v.name, sizeof v.name, line + 7);
        } else if (strncmp(line, "type ", 5) == 0) {
            copy_text(v.type, sizeof v.type, line + 5);
        } else if (strncmp(line, "seq ", 4) == 0) {
            v.seq = atoi(line + 4);
        } else if (strncmp(line, "verdict ", 8) == 0) {
            copy_text(v.verdict, sizeof v.verdict, line + 8);
        } else if (strncmp(line, "layer ", 6) == 0) {
            copy_text(v.layer, sizeof v.layer, line + 6);
        } else if (strncmp(line, "frame ", 6) == 0) {
            parse_hex(line + 6, v.frame, &v.frame_len);
        } else if (strncmp(line, "field ", 6) == 0) {
            field_t *f = &v.f[v.nf++];
            char *rest = line + 6, *sp = strchr(rest, ' ');
            size_t klen = sp ? (size_t)(sp - rest) : strlen(rest);
            memcpy(f->key, rest, klen);
            f->key[klen] = 0;
            if (sp) {
                char *tok, *save = NULL;
                copy_text(f->text, sizeof f->text, sp + 1);
                for (tok = strtok_r(sp + 1, " ", &save); tok && f->n < MAX_VALUES;
                     tok = strtok_r(NULL, " ", &save)) {
                    f->v[f->n++] = strtoll(tok, NULL, 10);
                }
            }
        } else if (strcmp(line, "end") == 0) {
            check_vector(&v);
            count++;
        }
    }
    fclose(fp);
    return count;
}

int main(int argc, char **argv)
{
    int nvec;
    test_crc_check_value();
    test_cobs_published_pairs();
    test_bench_safety();
    test_decoder_resync();
    nvec = argc > 1 ? run_vectors(argv[1]) : 0;
    if (argc > 1 && nvec <= 0) {
        printf("FAIL no vectors read from %s\n", argv[1]);
        failures++;
    }
    printf("%d vectors, %d checks, %d failures\n", nvec, checks, failures);
    return failures ? 1 : 0;
}
