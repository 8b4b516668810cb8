// Uncompressed image files written byte by byte, for uploads in formats that
// the browser can read pixels from but not encode (BMP, TIFF).

/** A 24-bit BMP of `rgba` (width × height pixels, 4 bytes each, rows top to bottom). */
export function bmpFile(width, height, rgba) {
  // Rows are stored bottom to top, as B G R, each padded to a multiple of 4 bytes.
  const rowBytes = Math.ceil((width * 3) / 4) * 4;
  const dataOffset = 14 + 40;
  const file = Buffer.alloc(dataOffset + rowBytes * height);
  file.write('BM', 0, 'latin1');
  file.writeUInt32LE(file.length, 2);
  file.writeUInt32LE(dataOffset, 10);
  file.writeUInt32LE(40, 14); // BITMAPINFOHEADER
  file.writeInt32LE(width, 18);
  file.writeInt32LE(height, 22);
  file.writeUInt16LE(1, 26); // planes
  file.writeUInt16LE(24, 28); // bits per pixel; the compression field after it stays 0: none
  file.writeUInt32LE(rowBytes * height, 34);
  for (let y = 0; y < height; y += 1) {
    const row = dataOffset + (height - 1 - y) * rowBytes;
    for (let x = 0; x < width; x += 1) {
      const from = 4 * (y * width + x);
      file[row + 3 * x] = rgba[from + 2];
      file[row + 3 * x + 1] = rgba[from + 1];
      file[row + 3 * x + 2] = rgba[from];
    }
  }
  return file;
}

/** A little-endian, uncompressed RGB TIFF of `rgba` in one strip. */
export function tiffFile(width, height, rgba) {
  const SHORT = 3;
  const LONG = 4;
  const pixelBytes = width * height * 3;
  const entries = [
    [256, LONG, 1, width], // ImageWidth
    [257, LONG, 1, height], // ImageLength
    [258, SHORT, 3, null], // BitsPerSample: 8, 8, 8, stored after the directory
    [259, SHORT, 1, 1], // Compression: none
    [262, SHORT, 1, 2], // PhotometricInterpretation: RGB
    [273, LONG, 1, null], // StripOffsets: the pixels, after the bits per sample
    [277, SHORT, 1, 3], // SamplesPerPixel
    [278, LONG, 1, height], // RowsPerStrip
    [279, LONG, 1, pixelBytes], // StripByteCounts
  ];
  const directoryOffset = 8;
  const bitsOffset = directoryOffset + 2 + 12 * entries.length + 4;
  const pixelsOffset = bitsOffset + 6;
  entries[2][3] = bitsOffset;
  entries[5][3] = pixelsOffset;

  const file = Buffer.alloc(pixelsOffset + pixelBytes);
  file.write('II', 0, 'latin1');
  file.writeUInt16LE(42, 2);
  file.writeUInt32LE(directoryOffset, 4);
  file.writeUInt16LE(entries.length, directoryOffset);
  entries.forEach(([tag, type, count, value], index) => {
    const at = directoryOffset + 2 + 12 * index;
    file.writeUInt16LE(tag, at);
    file.writeUInt16LE(type, at + 2);
    file.writeUInt32LE(count, at + 4);
    // A single SHORT sits in the first two bytes of the value field.
    if (type === SHORT && count === 1) file.writeUInt16LE(value, at + 8);
    else file.writeUInt32LE(value, at + 8);
  });
  // The next directory's offset stays 0: there is none.
  [8, 8, 8].forEach((bits, index) => file.writeUInt16LE(bits, bitsOffset + 2 * index));
  for (let pixel = 0; pixel < width * height; pixel += 1) {
    file[pixelsOffset + 3 * pixel] = rgba[4 * pixel];
    file[pixelsOffset + 3 * pixel + 1] = rgba[4 * pixel + 1];
    file[pixelsOffset + 3 * pixel + 2] = rgba[4 * pixel + 2];
  }
  return file;
}
