// Demo caller: java -Djava.library.path=DIR org.example.nextword.Demo MODEL TEXT...
// prints one line per TEXT: the words and probabilities, tab-separated.
package org.example.nextword;

import java.nio.charset.StandardCharsets;

public final class Demo {
    public static void main(String[] args) {
        System.load(System.getProperty("nextword.jni"));
        long model = NextwordNative.open(args[0].getBytes(StandardCharsets.UTF_8));
        long session = NextwordNative.sessionNew(model);
        double[] probs = new double[64];
        for (int i = 1; i < args.length; i++) {
            byte[] words = NextwordNative.suggest(session, args[i].getBytes(StandardCharsets.UTF_8), 3, probs);
            StringBuilder line = new StringBuilder();
            if (words.length > 0) {
                String[] w = new String(words, StandardCharsets.UTF_8).split("\u0000");
                for (int j = 0; j < w.length; j++) line.append(j > 0 ? "\t" : "").append(w[j]).append(' ').append(probs[j]);
            }
            System.out.println(line);
        }
        NextwordNative.sessionFree(session);
        NextwordNative.close(model);
    }
}
