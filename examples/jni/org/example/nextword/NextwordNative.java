// The JNI shim's methods as a Java class (the Kotlin sketch NextwordNative.kt declares the same);
// compiled and run by tests/test_native.py with Demo.java.
package org.example.nextword;

public final class NextwordNative {
    private NextwordNative() {}

    public static native long open(byte[] path);
    public static native void close(long model);
    public static native long sessionNew(long model);
    public static native void sessionFree(long session);
    public static native byte[] suggest(long session, byte[] text, int k, double[] probs);
}
