// swift-tools-version:5.7
// UNTESTED: no Swift compiler on the machine this was written on (see README, "Embedding on a device").
// Build the C library first (native/Makefile or CMake), then:
//   swift build -Xcc -I../../native/include -Xlinker -L../../native/build
import PackageDescription

let package = Package(
    name: "NextwordDemo",
    targets: [
        // the C API as a Swift module (module.modulemap over native/include/nextword.h)
        .systemLibrary(name: "CNextword", path: "Sources/CNextword"),
        .executableTarget(name: "Demo", dependencies: ["CNextword"], path: "Sources/Demo"),
    ]
)
