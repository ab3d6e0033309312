//! CRC-32 (IEEE 802.3, reflected polynomial 0xEDB88320), used to detect torn session records.

const fn table() -> [u32; 256] {
    let mut t = [0u32; 256];
    let mut i = 0;
    while i < 256 {
        let mut c = i as u32;
        let mut k = 0;
        while k < 8 {
            c = if c & 1 != 0 {
                0xEDB8_8320 ^ (c >> 1)
            } else {
                c >> 1
            };
            k += 1;
        }
        t[i] = c;
        i += 1;
    }
    t
}

static TABLE: [u32; 256] = table();

/// CRC-32 of `data`.
pub fn crc32(data: &[u8]) -> u32 {
    let mut c = !0u32;
    for &b in data {
        c = TABLE[((c ^ b as u32) & 0xFF) as usize] ^ (c >> 8);
    }
    !c
}

#[cfg(test)]
mod tests {
    #[test]
    fn check_value() {
        // The standard check value of CRC-32/ISO-HDLC for "123456789" is 0xCBF43926
        // (Williams, "A painless guide to CRC error detection algorithms", 1993; memory).
        assert_eq!(super::crc32(b"123456789"), 0xCBF4_3926);
    }
}
