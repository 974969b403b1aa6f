/* tlink_config.h - optional compile-time options of the tlink codec.
 *
 * Used when the build defines TLINK_USE_CONFIG (e.g. -DTLINK_USE_CONFIG); otherwise the
 * defaults in tlink.h apply. Copy this file into the firmware project and edit it there.
 * Inconsistent choices stop the build with #error in tlink.h.
 */
#ifndef TLINK_CONFIG_H
#define TLINK_CONFIG_H

/* Largest payload accepted and produced, bytes. Protocol maximum 200; the largest message
 * defined in protocol version 1 (pose) is 74, so values in [74, 200] are allowed. Smaller
 * values save RAM: the decoder holds TLINK_MAX_PAYLOAD + 17 bytes. */
#define TLINK_MAX_PAYLOAD 200

/* CRC-32 implementation: 256 = byte table (1 KiB of const data, fastest),
 * 16 = nibble table (64 bytes), 0 = bit by bit (no table, slowest). */
#define TLINK_CRC_TABLE 256

#endif
