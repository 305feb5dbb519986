/*
 * spinrig wire protocol v1: C reference for the device side (firmware).
 *
 * Normative text: firmware_protocol/SPEC.md. C99, no dynamic allocation, no stdio, no floats:
 * suitable for a Cortex-M0. Every encoder writes one whole frame (COBS-stuffed, 0x00 delimiter
 * included) into a caller's buffer of at least SR_MAX_WIRE bytes and returns its length, or 0
 * when an argument is out of range. The decoder takes host bytes one at a time (from a UART
 * interrupt or a USB CDC callback) and yields typed host commands.
 */
#ifndef SPINRIG_WIRE_H
#define SPINRIG_WIRE_H

#include <stddef.h>
#include <stdint.h>

#define SR_PROTOCOL_VERSION 1u
#define SR_MAX_PAYLOAD 250u
#define SR_MAX_BODY 254u    /* type + seq + payload + CRC */
#define SR_MAX_ENCODED 255u /* COBS adds one byte to a body of 1..254 bytes */
#define SR_MAX_WIRE 256u    /* encoded + delimiter */
#define SR_MIN_BODY 4u
#define SR_MAX_GYRO_BATCH 40u
#define SR_MAX_MOTORS 8u
#define SR_MAX_BOARD_ID 32u
#define SR_MAX_LOG_TEXT 200u
#define SR_THROTTLE_FULL 10000u /* 0.01 % units */
#define SR_ERROR_BURST_FRAMES 8u
#define SR_ERROR_BURST_WINDOW_MS 1000u

/* Message type codes. */
enum {
    SR_DEVICE_INFO = 0x01,
    SR_GYRO_BLOCK = 0x02,
    SR_MOTOR_STATE = 0x03,
    SR_DEVICE_STATUS = 0x04,
    SR_LOG_TEXT = 0x05,
    SR_COMMAND_OUTCOME = 0x06,
    SR_REQUEST_INFO = 0x41,
    SR_STREAM_CONTROL = 0x42,
    SR_ARM_BENCH = 0x43,
    SR_SET_THROTTLE = 0x44,
    SR_STOP_MOTORS = 0x45,
    SR_HOST_HEARTBEAT = 0x46,
    SR_SIM_TAP = 0xF0
};

/* COMMAND_OUTCOME result codes. */
enum {
    SR_OUTCOME_OK = 0,
    SR_OUTCOME_NOT_ARMED = 1,
    SR_OUTCOME_BAD_NONCE = 2,
    SR_OUTCOME_LIMITED = 3,
    SR_OUTCOME_MALFORMED = 4,
    SR_OUTCOME_UNSUPPORTED = 5,
    SR_OUTCOME_REFUSED_FAULT = 6,
    SR_OUTCOME_BAD_MOTOR_COUNT = 7
};

/* DEVICE_STATUS bench states and fault bits. */
enum { SR_BENCH_DISARMED = 0, SR_BENCH_ARMED = 1, SR_BENCH_SPINNING = 2 };
#define SR_FAULT_HEARTBEAT_LOST 0x0001u
#define SR_FAULT_STOP_COMMAND 0x0002u
#define SR_FAULT_PROTOCOL_ERRORS 0x0004u
#define SR_FAULT_THROTTLE_CAPPED 0x0008u
#define SR_FAULT_SENSOR 0x0010u
#define SR_FAULT_SUPPLY_LOW 0x0020u
#define SR_FAULT_OVERCURRENT 0x0040u
#define SR_FAULT_REBOOTED 0x0080u
#define SR_FAULT_GYRO_OVERRUN 0x0100u
#define SR_FAULT_MOTOR_TELEMETRY_LOST 0x0200u
/* Faults that forbid arming until cleared by the device itself. */
#define SR_FAULTS_BLOCKING_ARM (SR_FAULT_SENSOR | SR_FAULT_SUPPLY_LOW | SR_FAULT_OVERCURRENT)

/* ---------------------------------------------------------------- integrity and framing */

/* CRC-16/IBM-3740 ("CCITT-FALSE"); start with crc = 0xFFFF. Check: "123456789" -> 0x29B1. */
uint16_t sr_crc16(const uint8_t *data, size_t len, uint16_t crc);

/* COBS-encode len bytes (canonical form, SPEC 3.2). out needs len + len / 254 + 1 bytes.
 * Returns the encoded length (no delimiter). */
size_t sr_cobs_encode(const uint8_t *in, size_t len, uint8_t *out);

/* COBS-decode one packet (no delimiter). Returns the decoded length, or -1 on a zero byte,
 * a truncated block, or more than out_cap output bytes. */
int sr_cobs_decode(const uint8_t *in, size_t len, uint8_t *out, size_t out_cap);

/* Whole frame of type/seq/payload into out (cap >= SR_MAX_WIRE is always enough).
 * Returns wire bytes including the delimiter, 0 if the payload or cap is too small. */
size_t sr_frame_encode(uint8_t type, uint8_t seq, const uint8_t *payload, size_t len, uint8_t *out,
                       size_t cap);

/* ---------------------------------------------------------------- device to host messages */

typedef struct {
    uint8_t axis_convention;    /* 1 = FRD, 2 = FLU */
    uint32_t boot_id;           /* new value at every boot */
    uint32_t gyro_rate_mhz;     /* gyro output data rate, millihertz */
    uint32_t sens_num;          /* sensitivity = sens_num / sens_den counts per deg/s */
    uint32_t sens_den;
    uint16_t full_scale_dps;    /* deg/s */
    uint8_t filter_flags;       /* bit0 low-pass, bit1 static notch, bit2 RPM notch; 0 = raw */
    uint16_t onboard_cutoff_hz;        /* Hz, 0 = none */
    uint16_t onboard_notch_centre_hz;          /* Hz, 0 = none */
    uint16_t antialias_hz;      /* sensor's own anti-alias bandwidth, Hz, 0 = unknown */
    uint8_t motor_count;        /* 0..8 */
    uint8_t pole_pairs;         /* 1..255 */
    uint16_t heartbeat_timeout_ms;
    uint8_t max_batch;          /* 1..40 samples per GYRO_BLOCK */
    uint16_t throttle_ceiling;    /* 0.01 % */
    uint16_t motor_state_rate_hz;
    uint8_t board_id_len;       /* 0..32 */
    char board_id[SR_MAX_BOARD_ID]; /* printable ASCII, not NUL-terminated */
} sr_device_info_t;

typedef struct {
    uint32_t erpm;     /* electrical RPM */
    uint16_t throttle; /* commanded, 0.01 % */
    uint8_t flags;     /* bit0: erpm from live telemetry */
} sr_motor_entry_t;

typedef struct {
    uint32_t t_us;
    uint8_t count; /* 0..8 */
    sr_motor_entry_t motors[SR_MAX_MOTORS];
} sr_motor_state_t;

typedef struct {
    uint32_t t_us;
    uint32_t boot_id;
    uint8_t bench_state;
    uint16_t faults;
    uint16_t supply_mv;
    uint16_t current_10ma;
    uint16_t host_frames_ok;
    uint16_t host_frames_bad;
    uint8_t streaming;
} sr_device_status_t;

size_t sr_encode_device_info(const sr_device_info_t *m, uint8_t seq, uint8_t *out, size_t cap);
/* xyz: count interleaved roll, pitch, yaw samples in counts (3 * count int16). */
size_t sr_encode_gyro_block(uint32_t sample_seq, uint32_t t_us, const int16_t *xyz, uint8_t count,
                            uint8_t seq, uint8_t *out, size_t cap);
size_t sr_encode_motor_state(const sr_motor_state_t *m, uint8_t seq, uint8_t *out, size_t cap);
size_t sr_encode_device_status(const sr_device_status_t *m, uint8_t seq, uint8_t *out, size_t cap);
size_t sr_encode_log_text(uint8_t level, const char *text, size_t len, uint8_t seq, uint8_t *out,
                          size_t cap);
size_t sr_encode_command_outcome(uint8_t command_type, uint8_t command_seq, uint8_t result,
                             uint32_t detail, uint8_t seq, uint8_t *out, size_t cap);

/* ---------------------------------------------------------------- host commands */

typedef struct {
    uint8_t type; /* SR_REQUEST_INFO .. SR_HOST_HEARTBEAT, SR_SIM_TAP */
    uint8_t seq;  /* frame seq, echoed in COMMAND_OUTCOME */
    union {
        uint8_t enable;                    /* STREAM_CONTROL */
        uint32_t nonce;                    /* ARM_BENCH, HOST_HEARTBEAT */
        uint8_t reason;                    /* STOP_MOTORS */
        struct {
            uint32_t nonce;
            uint8_t count;
            uint16_t throttle[SR_MAX_MOTORS];
        } throttle;                        /* SET_THROTTLE */
        struct {
            uint8_t target;
            uint16_t strength;
        } tap;                             /* SIM_TAP */
    } u;
} sr_command_t;

typedef enum {
    SR_RX_NONE = 0,      /* byte consumed, no frame ended */
    SR_RX_COMMAND = 1,   /* *out holds a valid command */
    SR_RX_IDLE = 2,      /* empty frame (extra delimiter), ignore */
    SR_RX_CRC_ERROR = 3,
    SR_RX_MALFORMED = 4,
    SR_RX_OVERSIZE = 5,
    SR_RX_UNKNOWN = 6    /* valid frame of a type this device does not handle: skip */
} sr_rx_t;

typedef struct {
    uint8_t buf[SR_MAX_ENCODED];
    uint16_t len;
    uint8_t discarding;
    uint32_t frames_ok, crc_errors, malformed, oversize, unknown;
} sr_decoder_t;

void sr_decoder_init(sr_decoder_t *d);
/* Feed one received byte. On SR_RX_COMMAND, *out is filled. Never fails on garbage. */
sr_rx_t sr_decoder_push(sr_decoder_t *d, uint8_t byte, sr_command_t *out);
/* Decode one complete encoded frame (no delimiter); same verdicts as the push decoder. */
sr_rx_t sr_decode_frame(const uint8_t *enc, size_t len, sr_command_t *out);

/* ---------------------------------------------------------------- bench safety (SPEC 7) */

typedef struct {
    uint16_t heartbeat_timeout_ms;
    uint16_t throttle_ceiling;       /* 0.01 % */
    uint8_t motor_count;
    uint8_t armed;
    uint32_t nonce;
    uint32_t last_heartbeat_ms;
    uint16_t faults;               /* latched, cleared by a successful ARM_BENCH */
    uint16_t throttle[SR_MAX_MOTORS]; /* what the motors must be driven at now, 0.01 % */
    uint32_t bad_times_ms[SR_ERROR_BURST_FRAMES]; /* ring of recent bad-frame times */
    uint8_t bad_head;
    uint8_t bad_count;
} sr_bench_t;

typedef struct {
    uint8_t result; /* SR_OUTCOME_* */
    uint32_t detail;
} sr_verdict_t;

/* Starts disarmed with all throttles at zero and the REBOOTED fault latched. */
void sr_bench_init(sr_bench_t *b, uint16_t heartbeat_timeout_ms, uint16_t throttle_ceiling,
                   uint8_t motor_count);
/* Apply one valid host command at time now_ms; returns the COMMAND_OUTCOME verdict.
 * REQUEST_INFO and STREAM_CONTROL are accepted (OK) and left to the caller. */
sr_verdict_t sr_bench_command(sr_bench_t *b, const sr_command_t *cmd, uint32_t now_ms);
/* Report a bad host frame (CRC, malformed or oversize) at now_ms. Returns 1 when this
 * completes an error burst: the motors were stopped and the bench disarmed. */
int sr_bench_bad_frame(sr_bench_t *b, uint32_t now_ms);
/* Call at least once per control period. Returns 1 if the motors must stop now (heartbeat
 * timeout while armed); the bench is then already disarmed with throttles at zero. */
int sr_bench_tick(sr_bench_t *b, uint32_t now_ms);
/* Stop all motors at once and disarm, latching the given fault bits. */
void sr_bench_stop(sr_bench_t *b, uint16_t fault_bits);
uint8_t sr_bench_state(const sr_bench_t *b);

#endif
